-- region_coverage_trend: screening coverage among persons with lab-evidenced diabetes, all
-- districts, as it stood at each of the 12 month ends up to the period end: for each month end
-- m, the persons with diabetes first evidenced by m and a result collected in the
-- $window_months months ending at m and reported by m, and how many of them had an eGFR, a urine
-- ACR, and both, in that window and reported by m. Results are taken in their version as known at
-- the period end (an amendment reported later counts as it stands now); diabetes is dated by
-- its first evidence (person_status.diabetes_first_date). The point for the period itself is
-- the 'ALL' row of district_screening_coverage.
with month_ends as (
    select last_day(cast($period_end as date) - to_months(cast(k as integer))) as as_of
    from range(0, 12) as t(k)
),
known_tests as (
    -- an eGFR, or an ACR as daily_values_averaged counts one (what coverage counts)
    select person_key, collected_date, reported_date, is_egfr, is_acr
    from (
        select person_key, collected_date, reported_date,
               egfr is not null as is_egfr,
               coalesce(acr_basis in ('measured_acr', 'computed_from_albumin_and_creatinine',
                                      'timed_albumin_excretion')
                        and (acr_mg_g is not null or aer_mg_24h is not null or acr_comparator is not null),
                        false) as is_acr
        from measures_known
        -- only what falls in some month's window (the earliest window starts $window_months
        -- months before the earliest month end): the same rows, read once instead of scanning
        -- every year of the warehouse in the range joins below
        where collected_date > (select min(as_of) from month_ends)
                               - to_months(cast($window_months as integer))
    )
    where is_egfr or is_acr
),
diabetic as (
    select person_key, diabetes_first_date
    from person_status
    where period = $period and has_diabetes
),
per_month as (
    select m.as_of, d.person_key,
           bool_or(t.is_egfr) as has_egfr,
           bool_or(t.is_acr) as has_acr
    from month_ends as m
    join diabetic as d on d.diabetes_first_date <= m.as_of
    left join known_tests as t
        on t.person_key = d.person_key
       and t.collected_date > m.as_of - to_months(cast($window_months as integer))
       and t.collected_date <= m.as_of
       and t.reported_date <= m.as_of
    group by m.as_of, d.person_key
),
active as (
    select distinct m.as_of, r.person_key
    from month_ends as m
    join (
        select person_key, collected_date, reported_date from results_known
        where collected_date > (select min(as_of) from month_ends)
                               - to_months(cast($window_months as integer))
    ) as r
        on r.collected_date > m.as_of - to_months(cast($window_months as integer))
       and r.collected_date <= m.as_of
       and r.reported_date <= m.as_of
    join diabetic as d on d.person_key = r.person_key
),
counted as (
    select p.*
    from per_month as p
    semi join active as a on a.as_of = p.as_of and a.person_key = p.person_key
)
select
    $period as period,
    strftime(m.as_of, '%Y-%m') as as_of_month,
    count(p.person_key) as persons_with_diabetes,
    count(p.person_key) filter (where p.has_egfr) as with_egfr,
    count(p.person_key) filter (where p.has_acr) as with_acr,
    count(p.person_key) filter (where p.has_egfr and p.has_acr) as with_egfr_and_acr,
    round(count(p.person_key) filter (where p.has_egfr and p.has_acr) / nullif(count(p.person_key), 0), 4)
        as share_with_both
from month_ends as m
left join counted as p on p.as_of = m.as_of
group by m.as_of
order by m.as_of
