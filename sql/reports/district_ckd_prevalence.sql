-- district_ckd_prevalence: one row per period x district x sex x age band, plus per-district
-- and all-district totals ('ALL'). Internal (unsuppressed) table: the published copy is
-- published.district_ckd_prevalence.
-- persons_tested: persons with an eGFR or a (non-estimated) ACR collected in the window of
--   $window_months months ending at the period end.
-- persons_ckd: of those, persons with confirmed CKD (kidney_events) by the period end.
-- population: residents from config/regions/population.csv.
with tested as (
    select distinct person_key
    from daily_values_averaged
    where day > $period_end - to_months(cast($window_months as integer))
),
persons as (
    select p.*
    from person_status as p
    join tested as t on t.person_key = p.person_key
    where p.period = $period and p.sex in ('F', 'M')
),
cells as (
    select district_code, sex, age_band,
           count(*) as persons_tested,
           count(*) filter (where has_confirmed_ckd) as persons_ckd,
           count(*) filter (where has_confirmed_ckd and g_category in ('G3a', 'G3b', 'G4', 'G5')) as persons_ckd_g3_g5
    from persons
    group by grouping sets ((district_code, sex, age_band), (district_code), ())
),
population as (
    select district_code, sex, age_band, sum(population) as population
    from reference.population
    group by grouping sets ((district_code, sex, age_band), (district_code), ())
),
joined as (
select
    $period as period,
    coalesce(c.district_code, p.district_code, 'ALL') as district_code,
    coalesce(c.sex, p.sex, 'ALL') as sex,
    coalesce(c.age_band, p.age_band, 'ALL') as age_band,
    coalesce(c.persons_tested, 0) as persons_tested,
    coalesce(c.persons_ckd, 0) as persons_ckd,
    coalesce(c.persons_ckd_g3_g5, 0) as persons_ckd_g3_g5,
    p.population,
    round(c.persons_ckd / nullif(c.persons_tested, 0), 4) as ckd_share_of_tested,
    round(1000.0 * c.persons_ckd / nullif(p.population, 0), 2) as ckd_per_1000_residents
from cells as c
full join population as p
    on c.district_code is not distinct from p.district_code
   and c.sex is not distinct from p.sex
   and c.age_band is not distinct from p.age_band
)
select j.*
from joined as j
left join reference.age_bands as b on b.age_band = j.age_band
order by j.district_code = 'ALL', j.district_code, j.sex = 'ALL', j.sex, b.band_order nulls last
