-- floor_kept.sql: what the warehouse must keep of a month (DEVELOPERS.md, Design notes), written
-- the cheapest way, as a second lower bound beside floor.sql. Run after floor.sql in the same
-- connection, attached to a DuckDB file, in one transaction (as a run is):
--   every input row once, typed, in the 24 columns of result_versions (the person token
--   hashed with sha256 in DuckDB, standing in for the pipeline's HMAC; no line number), and
--   one row per computed eGFR (floor.sql's floor_egfr); then the commit.
-- No validation, no versions, no other measures, no person-level tables, no ledger.
-- Inputs: the variables of floor.sql, and the file attached as "kept".

create table kept.result_versions as
select
    'westerfold_general_lab' as source_id,
    hash(r.filename) as file_id,
    -- the line number is left out: row_number() over the whole input cost DuckDB 20 s at 10M
    -- rows, and a lower bound must stay low
    cast(null as bigint) as line_no,
    sha256(r.person_token) as person_key,
    nullif(trim(r.specimen_id), '') as specimen_id,
    try_cast(r.collected_date as date) as collected_date,
    try_cast(r.reported_at as date) as reported_date,
    'reported_at' as reported_date_basis,
    r.test_code as analyte,
    r.test_code as loinc,
    r.status,
    r.value as value_text,
    nullif(regexp_extract(trim(r.value), '^(<=|>=|<|>)', 1), '') as comparator,
    try_cast(trim(r.value) as double) as reported_value,
    trim(r.unit) as reported_unit,
    try_cast(trim(r.value) as double) as value,
    trim(r.unit) as unit,
    upper(trim(r.fasting)) in ('Y', 'YES', 'TRUE', '1') as is_fasting,
    try_cast(r.height_cm as double) as height_cm,
    upper(trim(r.sex)) as sex,
    try_cast(r.birth_year as integer) as birth_year,
    year(try_cast(r.collected_date as date)) - try_cast(r.birth_year as integer) as age_years,
    r.district_code,
    'accepted' as outcome
from read_csv(
    getvariable('input_glob'),
    header = true,
    delim = ',',
    quote = '"',
    filename = true,
    columns = {
        'person_token': 'VARCHAR', 'birth_year': 'VARCHAR', 'sex': 'VARCHAR',
        'district_code': 'VARCHAR', 'specimen_id': 'VARCHAR', 'collected_date': 'VARCHAR',
        'test_code': 'VARCHAR', 'value': 'VARCHAR', 'unit': 'VARCHAR', 'status': 'VARCHAR',
        'height_cm': 'VARCHAR', 'reported_at': 'VARCHAR', 'fasting': 'VARCHAR'
    }
) as r;

create table kept.egfr_measures as
select sha256(person_token) as person_key, * exclude (person_token) from floor_egfr;
