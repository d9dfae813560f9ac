-- The all-district headline of the published (suppressed) prevalence table for $period.
select persons_tested, persons_ckd, ckd_share_of_tested
from published.district_ckd_prevalence
where period = $period and district_code = 'ALL' and sex = 'ALL' and age_band = 'ALL'
