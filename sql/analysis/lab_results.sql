-- lab_results: one row per accepted result (the current version of each result), in canonical
-- units, keyed by the file and line it came from. Superseded, duplicate, withdrawn and pending
-- versions stay in result_versions; rejected rows in rejected_rows. A view (nothing is copied:
-- it follows result_versions as each run settles outcomes). Unordered: sort when you read it.
select
    v.source_id,
    f.sha256 as file_sha256,
    v.file_id,
    v.line_no,
    v.person_key,
    v.specimen_id,
    v.collected_date,
    v.reported_date,
    v.reported_date_basis,
    v.analyte,
    v.loinc,
    v.value_text,
    v.comparator,
    v.value,
    v.unit,
    v.reported_value,
    v.reported_unit,
    v.is_fasting,
    v.height_cm,
    v.sex,
    v.birth_year,
    v.age_years,
    v.district_code,
    v.status
from result_versions as v
join ingest_files as f on f.file_id = v.file_id
where v.outcome = 'accepted'
