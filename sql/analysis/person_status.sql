-- person_status: one row per person with any accepted result as known at the period end
-- ($period_end): demographics from the latest result, latest eGFR and ACR with their KDIGO
-- categories, confirmed CKD, lab-evidenced diabetes (confirmed as set by diabetes_rule) and the
-- KDIGO risk category.
with known as not materialized (
    -- not materialized: read twice (demographics, diabetes) rather than written out
    select * from results_known
),
demographics as (
    -- from the person's latest result (one arg_max of the three, all from the same row)
    select person_key, latest.sex, latest.birth_year, latest.district_code, last_test_date
    from (
        select person_key,
               arg_max({'sex': sex, 'birth_year': birth_year, 'district_code': district_code},
                       (collected_date, reported_date, source_id, file_id, line_no)) as latest,
               max(collected_date) as last_test_date
        from known
        group by person_key
    )
),
latest_egfr as (
    select person_key,
           -- the latest day's eGFR; of a day with one in each equation family (labs sending
           -- other birth years for one person), the adult one, whatever order the rows come in
           arg_max(value, (day, equation_family = 'adult')) as egfr,
           max(day) as last_egfr_date
    from daily_values_averaged
    where measure = 'egfr'
    group by person_key
),
latest_acr as (
    select person_key,
           arg_max(a_category, (collected_date, source_id, file_id, line_no)) as a_category,
           arg_max(acr_mg_g, (collected_date, source_id, file_id, line_no)) as acr_mg_g,
           max(collected_date) as last_acr_date
    from measures_known
    where a_category is not null and not is_acr_estimated
    group by person_key
),
abnormal_glycaemia as (
    -- ADA Standards of Care thresholds, compared in the unit the lab reported; a censored value
    -- counts only when certainly at or above the threshold
    select person_key, collected_date as day, analyte
    from known
    where (analyte = 'hba1c' and comparator is distinct from '<' and comparator is distinct from '<=' and (
               (reported_unit = '%' and reported_value >= $hba1c_percent)
            or (reported_unit = 'mmol/mol' and reported_value >= $hba1c_mmol_mol)))
       or (analyte = 'glucose' and is_fasting and comparator is distinct from '<' and comparator is distinct from '<=' and (
               (reported_unit = 'mg/dL' and reported_value >= $glucose_mg_dl)
            or (reported_unit = 'mmol/L' and reported_value >= $glucose_mmol_l)))
),
glycaemia_days as (
    select person_key, day, count(distinct analyte) as tests,
           row_number() over (partition by person_key order by day) - 1 as earlier_days
    from abnormal_glycaemia
    group by person_key, day
),
diabetes as (
    -- ADA Standards of Care: diabetes by labs on the day a second abnormal result confirms it
    -- (two tests on one day, or a second day); $diabetes_min_results = 1 with diabetes_rule single
    select person_key, min(day) as diabetes_first_date
    from glycaemia_days
    where tests >= $diabetes_min_results or earlier_days + 1 >= $diabetes_min_results
    group by person_key
),
ckd as (
    select person_key, min(confirmation_date) as ckd_confirmed_date
    from kidney_events
    where period = $period and event_type = 'ckd' and event_status = 'confirmed'
    group by person_key
)
select
    $period as period,
    d.person_key,
    d.sex,
    d.birth_year,
    year($period_end) - d.birth_year as age_years,
    b.age_band,
    -- a code not in the region's district list (or none) is summarised as 'unknown'
    case when d.district_code in (select district_code from reference.districts)
         then d.district_code else 'unknown' end as district_code,
    round(e.egfr, 2) as egfr,
    g.g_category,
    e.last_egfr_date,
    a.acr_mg_g,
    a.a_category,
    a.last_acr_date,
    c.ckd_confirmed_date is not null as has_confirmed_ckd,
    c.ckd_confirmed_date,
    x.diabetes_first_date is not null as has_diabetes,
    x.diabetes_first_date,
    case when abs(e.last_egfr_date - a.last_acr_date) <= $risk_window_days then k.risk_category end
        as kdigo_risk,
    d.last_test_date
from demographics as d
left join latest_egfr as e on e.person_key = d.person_key
left join reference.gfr_categories as g on e.egfr >= g.lower_bound and e.egfr < g.upper_bound
left join latest_acr as a on a.person_key = d.person_key
left join ckd as c on c.person_key = d.person_key
left join diabetes as x on x.person_key = d.person_key
left join reference.age_bands as b
    on year($period_end) - d.birth_year between b.age_min and b.age_max
left join reference.kdigo_risk as k on k.g_category = g.g_category and k.a_category = a.a_category
order by d.person_key
