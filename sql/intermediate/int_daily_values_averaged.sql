-- int_daily_values_averaged: one row per person, measure (egfr or acr) and collection day,
-- as known at the period end (int_measures_known: results collected or reported later, and
-- amendments or cancellations reported later, are left out).
-- Daily value = the mean of that person's values on that day, across labs.
-- ACR estimated from a protein ratio is left out (project decision 4).
-- Unordered: its readers order what they need (kidney_events by day within a person). At 30M
-- results the sort ran DuckDB out of memory at its 2 GB limit; without it the link stage
-- completes (bench/results.md).
select person_key, 'egfr' as measure, collected_date as day, avg(egfr) as value, count(*) as n_results
from int_measures_known
where egfr is not null
group by person_key, collected_date
union all
select person_key, 'acr' as measure, collected_date as day, avg(acr_mg_g) as value, count(*) as n_results
from int_measures_known
where acr_mg_g is not null and not is_acr_estimated
group by person_key, collected_date
