-- district_estimated_acr_sensitivity: what counting estimated albuminuria (ACR estimated from a
-- protein ratio, Sumida et al. 2020, and a dipstick's category) would add to the default
-- indicators, which leave it out (project decision 4). Per district and 'ALL':
--   persons_tested_added: persons (sex F or M, as district_ckd_prevalence) whose only result in
--     the $window_months months is an estimated albuminuria;
--   persons_ckd_added: of the persons tested counting those, persons without confirmed CKD whose
--     albuminuria, estimated days counted, stays at or above the CKD threshold (rule ckd_acr of
--     reference.trajectory_rules: 30 mg/g) on consecutive days spanning its min_span_days (90);
--     a day with a measured ACR goes by its A2 status (is_at_or_above_a2, as the rule reads it), a
--     day with only estimates by the estimated category (A2 or A3 qualifies);
--   with_acr_added / with_egfr_and_acr_added: persons with diabetes (as
--     district_screening_coverage) whose ACR in the window is estimated only, and of those, with
--     an eGFR (they would move into with_egfr_and_acr).
-- The default counts are those of district_ckd_prevalence and district_screening_coverage.
with rule as (
    select threshold, min_span_days from reference.trajectory_rules where rule_id = 'ckd_acr'
),
window_start as (
    select $period_end - to_months(cast($window_months as integer)) as day
),
estimated_days as (
    select person_key, collected_date as day,
           bool_or(coalesce(is_at_or_above_a2, a_category in ('A2', 'A3'))) as qualifies
    from measures_known
    where is_acr_estimated and (is_at_or_above_a2 is not null or a_category is not null)
    group by person_key, collected_date
),
albuminuria_days as (
    -- a measured day by its A2 status (as the ckd_acr rule reads it); a day with only estimates
    -- by their estimated category
    select coalesce(m.person_key, e.person_key) as person_key, coalesce(m.day, e.day) as day,
           coalesce(m.is_at_or_above_a2, e.qualifies) as qualifies
    from (select person_key, day, is_at_or_above_a2 from daily_values_averaged
          where measure = 'acr' and is_at_or_above_a2 is not null) as m
    full join estimated_days as e on e.person_key = m.person_key and e.day = m.day
),
islands as (
    select person_key, day, qualifies,
           count(*) filter (where not qualifies) over (partition by person_key order by day
                                                      rows unbounded preceding) as island
    from albuminuria_days
),
confirmed_with_estimates as (
    select distinct person_key
    from islands
    where qualifies
    group by person_key, island
    having max(day) - min(day) >= (select min_span_days from rule)
),
tested_default as (
    select distinct person_key from daily_values_averaged where day > (select day from window_start)
),
tested_estimated as (
    select distinct person_key from estimated_days where day > (select day from window_start)
),
persons as (
    select p.district_code,
           d.person_key is not null as is_tested,
           d.person_key is null and e.person_key is not null as is_tested_added,
           not p.has_confirmed_ckd and c.person_key is not null as is_ckd_added
    from person_status as p
    left join tested_default as d on d.person_key = p.person_key
    left join tested_estimated as e on e.person_key = p.person_key
    left join confirmed_with_estimates as c on c.person_key = p.person_key
    where p.period = $period and p.sex in ('F', 'M') and (d.person_key is not null or e.person_key is not null)
),
window_values as (
    select person_key, bool_or(measure = 'egfr') as has_egfr, bool_or(measure = 'acr') as has_acr
    from daily_values_averaged
    where day > (select day from window_start)
    group by person_key
),
active as (
    select distinct person_key from results_known where collected_date > (select day from window_start)
),
diabetic as (
    select p.district_code,
           not coalesce(w.has_acr, false) and e.person_key is not null as is_acr_added,
           not coalesce(w.has_acr, false) and e.person_key is not null and coalesce(w.has_egfr, false)
               as is_both_added
    from person_status as p
    join active as a on a.person_key = p.person_key
    left join window_values as w on w.person_key = p.person_key
    left join tested_estimated as e on e.person_key = p.person_key
    where p.period = $period and p.has_diabetes
),
tested_counts as (
    select coalesce(district_code, 'ALL') as district_code,
           count(*) filter (where is_tested_added) as persons_tested_added,
           count(*) filter (where is_ckd_added) as persons_ckd_added
    from persons
    group by grouping sets ((district_code), ())
),
diabetes_counts as (
    select coalesce(district_code, 'ALL') as district_code,
           count(*) filter (where is_acr_added) as with_acr_added,
           count(*) filter (where is_both_added) as with_egfr_and_acr_added
    from diabetic
    group by grouping sets ((district_code), ())
)
select
    $period as period,
    coalesce(t.district_code, d.district_code) as district_code,
    coalesce(t.persons_tested_added, 0) as persons_tested_added,
    coalesce(t.persons_ckd_added, 0) as persons_ckd_added,
    coalesce(d.with_acr_added, 0) as with_acr_added,
    coalesce(d.with_egfr_and_acr_added, 0) as with_egfr_and_acr_added
from tested_counts as t
full join diabetes_counts as d on d.district_code = t.district_code
order by coalesce(t.district_code, d.district_code) = 'ALL', coalesce(t.district_code, d.district_code)
