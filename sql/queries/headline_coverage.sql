-- The all-district headline of the published (suppressed) screening coverage table for $period.
select persons_with_diabetes, with_egfr_and_acr, share_with_both
from published.district_screening_coverage
where period = $period and district_code = 'ALL'
