-- district_ckd_categories: persons with confirmed CKD by the period end, among persons tested in
-- the $window_months months ending at it, by the KDIGO 2012 GFR category of their latest eGFR
-- (G1 .. G5, unknown: no eGFR) and, separately, by the albuminuria category of their latest
-- measured ACR (A1 .. A3, unknown: no ACR), per district and 'ALL'. Long format: one row per
-- period x district x category axis x category, every category of every district present
-- (zeros included). The same persons as district_ckd_prevalence (sex F or M), so the categories
-- of one axis add up to its persons_ckd (sex and age band 'ALL'), the G3a to G5 rows to its
-- persons_ckd_g3_g5, and persons_tested is its persons_tested.
with tested as (
    select distinct person_key
    from daily_values_averaged
    where day > $period_end - to_months(cast($window_months as integer))
),
persons as (
    select p.district_code, p.has_confirmed_ckd, p.g_category, p.a_category
    from person_status as p
    join tested as t on t.person_key = p.person_key
    where p.period = $period and p.sex in ('F', 'M')
),
districts as (
    select district_code from persons
    union
    select district_code from reference.population
    union
    select 'ALL'
),
categories (category_axis, category, category_order) as (
    values ('gfr', 'G1', 1), ('gfr', 'G2', 2), ('gfr', 'G3a', 3), ('gfr', 'G3b', 4), ('gfr', 'G4', 5),
           ('gfr', 'G5', 6), ('gfr', 'unknown', 7),
           ('albuminuria', 'A1', 1), ('albuminuria', 'A2', 2), ('albuminuria', 'A3', 3),
           ('albuminuria', 'unknown', 4)
),
classified as (
    select district_code, 'gfr' as category_axis, coalesce(g_category, 'unknown') as category
    from persons
    where has_confirmed_ckd
    union all
    select district_code, 'albuminuria' as category_axis, coalesce(a_category, 'unknown') as category
    from persons
    where has_confirmed_ckd
),
counts as (
    select case when grouping(district_code) = 1 then 'ALL' else district_code end as district_code,
           category_axis, category, count(*) as persons_ckd
    from classified
    group by grouping sets ((district_code, category_axis, category), (category_axis, category))
),
tested_counts as (
    select case when grouping(district_code) = 1 then 'ALL' else district_code end as district_code,
           count(*) as persons_tested
    from persons
    group by grouping sets ((district_code), ())
)
select
    $period as period,
    d.district_code,
    c.category_axis,
    c.category,
    coalesce(k.persons_ckd, 0) as persons_ckd,
    coalesce(t.persons_tested, 0) as persons_tested,
    round(100.0 * coalesce(k.persons_ckd, 0) / nullif(t.persons_tested, 0), 2) as ckd_per_100_tested
from districts as d
cross join categories as c
left join counts as k
    on k.district_code = d.district_code and k.category_axis = c.category_axis and k.category = c.category
left join tested_counts as t on t.district_code = d.district_code
order by d.district_code = 'ALL', d.district_code, c.category_axis = 'albuminuria', c.category_order
