-- district_screening_coverage: one row per period x district (plus 'ALL'): among persons with
-- lab-evidenced diabetes by the period end and any result in the window, how many had an eGFR,
-- a urine ACR, and both, collected in the $window_months months ending at the period end.
-- ACR is what finds moderately increased albuminuria (A2) while it can still be treated.
with window_values as (
    select person_key,
           bool_or(measure = 'egfr') as has_egfr,
           bool_or(measure = 'acr') as has_acr
    from daily_values_averaged
    where day > $period_end - to_months(cast($window_months as integer))
    group by person_key
),
active as (
    select distinct person_key
    from results_known
    where collected_date > $period_end - to_months(cast($window_months as integer))
),
diabetic as (
    select p.district_code, coalesce(w.has_egfr, false) as has_egfr, coalesce(w.has_acr, false) as has_acr
    from person_status as p
    join active as a on a.person_key = p.person_key
    left join window_values as w on w.person_key = p.person_key
    where p.period = $period and p.has_diabetes
)
select
    $period as period,
    coalesce(district_code, 'ALL') as district_code,
    count(*) as persons_with_diabetes,
    count(*) filter (where has_egfr) as with_egfr,
    count(*) filter (where has_acr) as with_acr,
    count(*) filter (where has_egfr and has_acr) as with_egfr_and_acr,
    round(count(*) filter (where has_egfr and has_acr) / nullif(count(*), 0), 4) as share_with_both
from diabetic
group by grouping sets ((district_code), ())
order by district_code is null, district_code
