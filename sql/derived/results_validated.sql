-- results_validated: one row per landed row of this run, with its value in the canonical
-- unit and the first rule it breaks (reason_code null = well-formed). The order of the CASE is
-- the order in which rules are checked; DEVELOPERS.md lists every code. The raw line is kept
-- on a rejected row only (for rejected_rows). Built one file at a time, as each is landed.
with converted as (
    select
        s.*,
        f.factor is not null as unit_allowed,
        s.reported_value * f.factor + f."offset" as value,
        a.canonical_unit as unit,
        r.min_value,
        r.max_value,
        k.unit is not null as unit_known,
        a.allowed_units,
        o.other_units,
        -- age at collection in completed years, the birth taken at mid-year (1 July) when only
        -- the year is known: off by at most about half a year (pipeline/stages/measure.py, MID_YEAR)
        -- (a birth year more than 200 years back keeps the crude difference, which the age rule
        -- rejects, so that make_date never sees a year it cannot represent)
        case
            when s.birth_year between year(s.collected_date) - 200 and year(s.collected_date)
                then greatest(0, floor(datediff('day', make_date(s.birth_year, 7, 1), s.collected_date) / 365.25))::bigint
            else year(s.collected_date) - s.birth_year
        end as age_years
    from landed_rows_typed as s
    left join reference.unit_factors as f on f.analyte = s.analyte and f.unit = s.reported_unit
    left join (
        select a.analyte, a.canonical_unit, string_agg(u.unit, ', ' order by u.unit) as allowed_units
        from reference.analytes as a join reference.unit_factors as u on u.analyte = a.analyte
        group by a.analyte, a.canonical_unit
    ) as a on a.analyte = s.analyte
    left join reference.ranges as r on r.analyte = s.analyte
    left join (select distinct unit from reference.unit_factors) as k on k.unit = s.reported_unit
    left join (
        -- the other units of the same analyte, for a value out of range in the unit it came in
        select u.analyte, u.unit,
               list({'unit': o.unit, 'factor': o.factor, 'offset': o."offset"} order by o.unit) as other_units
        from reference.unit_factors as u
        join reference.unit_factors as o on o.analyte = u.analyte and o.unit <> u.unit
        group by u.analyte, u.unit
    ) as o on o.analyte = s.analyte and o.unit = s.reported_unit
),
alternative as (
    -- the value would be plausible in another unit of the same analyte: most likely mislabelled
    -- (worked out only for the few rows out of range; the first such unit by name)
    select
        c.*,
        list_filter(
            case when c.unit_allowed and not (c.value between c.min_value and c.max_value)
                 then c.other_units end,
            lambda u: c.reported_value * u.factor + u."offset" between c.min_value and c.max_value
        ) as plausible_units
    from converted as c
),
judged as (
    select
        c.*,
        list_min(list_transform(c.plausible_units, lambda u: u.unit)) as other_unit,
        list_min(list_transform(c.plausible_units, lambda u: c.reported_value * u.factor + u."offset")) as other_value,
        case
            when c.row_fault is not null then split_part(c.row_fault, ':', 1)
            when c.person_key is null then 'missing_person'
            when c.loinc is null or c.analyte is null then 'unknown_test_code'
            when c.status not in ('final', 'amended', 'corrected', 'cancelled',
                                  'entered-in-error', 'preliminary')
                 or c.status is null then 'unknown_status'
            when c.collected_date is null then 'invalid_date'
            when c.collected_date > c.reported_date then 'future_date'
            when c.birth_year is null then 'invalid_birth_year'
            when c.birth_year > year(c.collected_date) then 'collected_before_birth'
            when c.age_years > 120 then 'age_over_120'
            when c.status in ('cancelled', 'entered-in-error') then null
            when c.result_type = 'ordinal' and c.reading is null then 'unknown_reading'
            when c.result_type = 'ordinal' then null
            when c.reported_value is null or isnan(c.reported_value) then 'not_numeric'
            when c.unit_text is null or trim(c.unit_text) = '' then 'unit_missing'
            when c.reported_unit is null or not c.unit_known then 'unit_unknown'
            when not c.unit_allowed then 'unit_incompatible'
            when not (c.value between c.min_value and c.max_value) and len(c.plausible_units) > 0
                then 'implausible_for_unit'
            when not (c.value between c.min_value and c.max_value) then 'out_of_range'
        end as reason_code
    from alternative as c
)
select
    -- the columns of a well-formed row (result_versions without its outcome), then the verdict
    j.source_id, j.file_id, j.line_no, j.person_key, j.specimen_id, j.collected_date, j.reported_date,
    j.reported_date_basis, j.analyte, j.loinc, j.status, j.value_text, j.comparator, j.reported_value,
    j.reported_unit, j.value, j.unit, j.is_fasting, j.height_cm, j.sex, j.birth_year, j.age_years,
    j.district_code,
    j.reason_code,
    case j.reason_code
        when 'wrong_field_count' then 'row has ' || split_part(j.row_fault, ':', 2)
        when 'malformed_record' then 'record is not a readable Observation: ' || split_part(j.row_fault, ':', 2)
        when 'unknown_patient' then 'subject ' || split_part(j.row_fault, ':', 2)
        when 'missing_person' then 'no person token on the row'
        when 'unknown_test_code' then 'test code ' || coalesce('"' || j.test_code_text || '"', '(blank)')
             || ' is not mapped to an analyte (add it to the source''s test_codes or analytes.yaml)'
        when 'unknown_status' then 'status ' || coalesce('"' || j.status_text || '"', '(blank)')
             || ' is not a FHIR Observation status (map it under status_codes)'
        when 'invalid_date' then 'collection date ' || coalesce('"' || j.collected_text || '"', '(blank)')
             || ' is not a valid date'
        when 'future_date' then 'collected ' || strftime(j.collected_date, '%Y-%m-%d')
             || ', after its report date ' || strftime(j.reported_date, '%Y-%m-%d')
        when 'invalid_birth_year' then 'birth year ' || coalesce('"' || j.birth_year_text || '"', '(blank)')
             || ' is not a year'
        when 'collected_before_birth' then 'collected in ' || year(j.collected_date)::varchar
             || ', before the birth year ' || j.birth_year::varchar
        when 'age_over_120' then 'age at test ' || j.age_years::varchar || ' years is over 120'
        when 'unknown_reading' then 'reading ' || coalesce('"' || j.value_text || '"', '(blank)')
             || ' is not a known ' || j.analyte || ' reading (add its spelling under readings in analytes.yaml)'
        when 'not_numeric' then 'value ' || coalesce('"' || j.value_text || '"', '(blank)') || ' is not a number'
        when 'unit_missing' then 'no unit given for ' || j.analyte
        when 'unit_unknown' then 'unit "' || j.unit_text || '" is not known (add a unit alias to the source config)'
        when 'unit_incompatible' then 'unit ' || coalesce(j.reported_unit, j.unit_text) || ' cannot express '
             || j.analyte || ' (expected ' || j.allowed_units || ')'
        when 'implausible_for_unit' then j.analyte || ' ' || j.value_text || ' ' || j.reported_unit
             || ' is implausible; as ' || j.other_unit || ' it would be plausible: check the unit'
        when 'out_of_range' then j.analyte || ' ' || j.value_text || ' ' || coalesce(j.reported_unit, '')
             || ' is outside the plausible range ' || j.min_value::varchar || '-' || j.max_value::varchar
             || ' ' || j.unit
        -- any other fault found while reading (identifier_in_value, control_character,
        -- truncated_line, invalid_report_date, collected_after_run): the reader's own words
        else substr(j.row_fault, length(split_part(j.row_fault, ':', 1)) + 2)
    end as message,
    case when j.reason_code is not null then j.raw_text end as raw_text
from judged as j
