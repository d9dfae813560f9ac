-- daily_values_averaged: one row per person, measure (egfr or acr), collection day and
-- equation family, as known at the period end (measures_known: results collected or
-- reported later, and amendments or cancellations reported later, are left out).
-- egfr: value = the mean of that person's eGFRs on that day, across labs; equation_family =
--   'child' for results collected before $adult_min_age (age estimated at collection, the birth
--   taken at mid-year), else 'adult'. Trajectory rules that compare values with each other
--   (decline, progression, rapid decline) never compare across families: the child and adult
--   equations differ by up to a third for the same creatinine at 18.
-- acr: value = the mean of the day's measured ACRs in mg/g (censored values left out: a bound is
--   not a value; null when the day has none, e.g. only a timed excretion or a censored ACR);
--   is_at_or_above_a2 = every result of the day whose KDIGO A2 status is known (in the unit
--   reported, kidney_measures.is_at_or_above_a2) is at or above A2; null when none is known.
--   Measured ACRs, ACRs computed from albumin and creatinine and timed albumin excretion count;
--   ACR estimated from a protein ratio or a dipstick is left out (project decision 4).
-- Unordered: its readers order what they need (kidney_events by day within a person). At 30M
-- results the sort ran DuckDB out of memory at its 2 GB limit; without it the link stage
-- completes (bench/results.md).
select person_key, 'egfr' as measure, collected_date as day, avg(egfr) as value, count(*) as n_results,
       case when age_years >= $adult_min_age then 'adult' else 'child' end as equation_family,
       cast(null as boolean) as is_at_or_above_a2
from measures_known
where egfr is not null
group by person_key, collected_date, equation_family
union all
select person_key, 'acr' as measure, collected_date as day, avg(acr_mg_g) as value, count(*) as n_results,
       cast(null as varchar) as equation_family,
       bool_and(is_at_or_above_a2) as is_at_or_above_a2
from measures_known
where acr_basis in ('measured_acr', 'computed_from_albumin_and_creatinine', 'timed_albumin_excretion')
  and (acr_mg_g is not null or aer_mg_24h is not null or acr_comparator is not null)
group by person_key, collected_date
