-- unmapped_code_values: one row per source, file, field and code value of this run's landed rows
-- that the source's config does not map, with the config key that would map it and the rows
-- affected. Built one file at a time, as each is landed (pipeline/stages/validate.py, judge_file).
-- Without it a sex written 'W' silently becomes unknown (no eGFR), and a unit, status, test code
-- or fasting flag the config does not know is only a rejection reason, never named as a gap in
-- the mapping. A blank value is missing, not unmapped; rows with a whole-row fault are left out.
with staged as (
    select * from landed_rows_typed where row_fault is null
),
unmapped as (
    select source_id, file_id, 'sex' as field, 'sex_codes' as config_key, trim(sex_text) as code
    from staged
    where nullif(trim(sex_text), '') is not null
      and upper(trim(sex_text)) not in ('F', 'FEMALE', 'M', 'MALE', 'U', 'UNKNOWN', 'OTHER')
    union all
    select source_id, file_id, 'unit', 'unit_aliases', trim(unit_text)
    from staged
    where nullif(trim(unit_text), '') is not null and reported_unit is null
      and coalesce(result_type, 'numeric') = 'numeric'
    union all
    select source_id, file_id, 'status', 'status_codes', trim(status_text)
    from staged
    where nullif(trim(status_text), '') is not null
      and coalesce(status, '') not in ('final', 'amended', 'corrected', 'cancelled',
                                       'entered-in-error', 'preliminary')
    union all
    select source_id, file_id, 'test_code', 'test_codes', trim(test_code_text)
    from staged
    where nullif(trim(test_code_text), '') is not null and analyte is null
    union all
    select source_id, file_id, 'fasting', 'fasting_codes', trim(fasting_text)
    from staged
    where nullif(trim(fasting_text), '') is not null
      and upper(trim(fasting_text)) not in ('Y', 'YES', 'TRUE', '1', 'N', 'NO', 'FALSE', '0')
)
select source_id, file_id, field, config_key, left(code, 40) as code, count(*) as rows
from unmapped
group by all
