-- district_ckd_stages: persons with confirmed CKD by the period end, among persons tested in the
-- $window_months months ending at it, by the KDIGO GFR category of their latest eGFR and the
-- albuminuria category of their latest measured ACR (KDIGO 2012), per district and 'ALL'.
-- One row per district so that suppression is decided once per count.
with tested as (
    select distinct person_key
    from int_daily_values_averaged
    where day > $period_end - to_months(cast($window_months as integer))
),
ckd as (
    select p.district_code, p.g_category, p.a_category
    from person_status as p
    join tested as t on t.person_key = p.person_key
    where p.period = $period and p.has_confirmed_ckd
)
select
    $period as period,
    coalesce(district_code, 'ALL') as district_code,
    count(*) as persons_ckd,
    count(*) filter (where g_category = 'G1') as g1,
    count(*) filter (where g_category = 'G2') as g2,
    count(*) filter (where g_category = 'G3a') as g3a,
    count(*) filter (where g_category = 'G3b') as g3b,
    count(*) filter (where g_category = 'G4') as g4,
    count(*) filter (where g_category = 'G5') as g5,
    count(*) filter (where g_category is null) as g_unknown,
    count(*) filter (where a_category = 'A1') as a1,
    count(*) filter (where a_category = 'A2') as a2,
    count(*) filter (where a_category = 'A3') as a3,
    count(*) filter (where a_category is null) as a_unknown
from ckd
group by grouping sets ((district_code), ())
order by district_code is null, district_code
