-- diabetes_acr_strata: persons with lab-evidenced diabetes and any result in the $window_months
-- months ending at the period end (the persons of district_screening_coverage), counted per
-- district, age group ($albuminuria_age_bands: lower bounds, the last open), sex and KDIGO GFR
-- category of the latest eGFR ('unknown': none): how many had a urine ACR in the window and,
-- among those, how many had a latest measured ACR in the window of A2 or A3. The input of the
-- expected undetected albuminuria (district_undetected_albuminuria, pipeline/core/undetected.py).
with window_acr as (
    select distinct person_key
    from daily_values_averaged
    where measure = 'acr' and day > $period_end - to_months(cast($window_months as integer))
),
active as (
    select distinct person_key
    from results_known
    where collected_date > $period_end - to_months(cast($window_months as integer))
),
diabetic as (
    select
        p.district_code,
        -- lower bound of the person's age group; -1 when the age is not known
        coalesce(list_max(list_filter(cast($albuminuria_age_bands as integer[]), lambda b: b <= p.age_years)), -1)
            as age_group_min,
        p.sex,
        coalesce(p.g_category, 'unknown') as g_category,
        w.person_key is not null as has_acr,
        -- latest measured (not estimated) ACR with a category, collected in the window
        w.person_key is not null
            and p.last_acr_date > $period_end - to_months(cast($window_months as integer))
            and p.a_category is not null as has_acr_category,
        p.a_category in ('A2', 'A3') as is_a2_a3
    from person_status as p
    join active as a on a.person_key = p.person_key
    left join window_acr as w on w.person_key = p.person_key
    where p.period = $period and p.has_diabetes
)
select
    $period as period,
    district_code,
    age_group_min,
    sex,
    g_category,
    count(*) as persons_with_diabetes,
    count(*) filter (where has_acr) as with_acr,
    count(*) filter (where has_acr_category) as with_acr_categorised,
    count(*) filter (where has_acr_category and is_a2_a3) as with_acr_a2_a3
from diabetic
group by all
order by district_code, age_group_min, sex, g_category
