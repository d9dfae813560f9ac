-- The snapshot period's person status of every person whose results did not change since it was
-- built (not in link_persons), relabelled to this period with the age and age band at this
-- period end (as sql/analysis/person_status.sql computes them): the link stage's carry-over.
select p.* replace ($period as period, year($period_end) - p.birth_year as age_years,
                    b.age_band as age_band)
from person_status as p
left join reference.age_bands as b
    on year($period_end) - p.birth_year between b.age_min and b.age_max
where p.period = $snapshot and p.person_key not in (select person_key from link_persons)
