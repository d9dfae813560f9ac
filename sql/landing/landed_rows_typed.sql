-- landed_rows_typed: one row per landed input row, renamed, cast and tagged.
-- Reads landed_rows (one file's rows as pipeline/stages/ingest/ reads them: the validate stage
-- runs this over each file as it is landed) and the reference tables; judges nothing (that
-- is results_validated).
with parsed as (
    select
        l.*,
        trim(l.value_clean) as value_trimmed,
        regexp_extract(trim(l.value_clean), '^(<=|>=|≤|≥|<|>)', 1) as comparator_raw,
        lower(replace(replace(trim(l.unit_text), 'µ', 'u'), 'μ', 'u')) as unit_key
    from landed_rows as l
),
numbers as (
    select
        p.*,
        case p.comparator_raw when '≤' then '<=' when '≥' then '>=' when '' then null
             else p.comparator_raw end as comparator,
        trim(substr(p.value_trimmed, length(p.comparator_raw) + 1)) as number_text
    from parsed as p
)
select
    n.source_id,
    n.file_id,
    n.line_no,
    n.raw_text,
    n.row_fault,
    n.person_key,
    nullif(trim(n.specimen_id), '') as specimen_id,
    n.collected_text,
    n.collected_date,
    n.reported_date,
    n.reported_date_basis,
    n.test_code as loinc,
    n.test_code_text,
    c.analyte,
    an.result_type,
    rd.reading,
    n.status,
    n.status_text,
    n.value_text,
    n.comparator,
    case when regexp_full_match(n.number_text, '[+-]?([0-9]+[.]?[0-9]*|[.][0-9]+)([eE][+-]?[0-9]+)?')
         then cast(n.number_text as double) end as reported_value,
    n.unit_text,
    coalesce(sa.unit, ga.unit, ku.unit) as reported_unit,
    try_cast(n.height_text as double) as height_cm,
    case
        when c.is_fasting_code then true
        when upper(trim(n.fasting_text)) in ('Y', 'YES', 'TRUE', '1') then true
        when upper(trim(n.fasting_text)) in ('N', 'NO', 'FALSE', '0') then false
    end as is_fasting,
    case
        when upper(trim(n.sex_text)) in ('F', 'FEMALE') then 'F'
        when upper(trim(n.sex_text)) in ('M', 'MALE') then 'M'
        else 'U'
    end as sex,
    n.sex_text,
    n.fasting_text,
    -- a birth year is four digits: '1950.5' or '1950x' is not a year (a cast would round it)
    case when regexp_full_match(trim(n.birth_year_text), '[0-9]{4}')
         then cast(trim(n.birth_year_text) as integer) end as birth_year,
    n.birth_year_text,
    -- district codes are matched by case and without surrounding spaces (' wf03' is WF03)
    nullif(upper(trim(n.district_code)), '') as district_code
from numbers as n
left join reference.analyte_codes as c on c.loinc = n.test_code
left join reference.analytes as an on an.analyte = c.analyte
left join reference.ordinal_readings as rd
    on rd.analyte = c.analyte and rd.spelling = lower(trim(n.value_clean))
left join reference.unit_aliases as sa on sa.source_id = n.source_id and sa.alias_key = n.unit_key
left join reference.unit_aliases as ga on ga.source_id = '*' and ga.alias_key = n.unit_key
left join (select distinct unit from reference.unit_factors) as ku on ku.unit = trim(n.unit_text)
