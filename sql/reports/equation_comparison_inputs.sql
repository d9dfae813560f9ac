-- equation_comparison_inputs (transient, person-level: built as a temporary table, never kept):
-- for each adult with a creatinine eGFR collected in the $window_months months ending at the
-- period end, the creatinine results of their latest such day, with the eGFR under the equation
-- in force (creatinine alone, and the creatinine-cystatin C one where it was used that day) and
-- what the comparison equation needs (creatinine in mg/dL, age at test, sex). Input of
-- district_equation_change (pipeline/core/equation_impact.py).
with window_creatinine as (
    select m.person_key, m.collected_date as day, m.sex, m.age_years, m.egfr, m.egfr_equation,
           m.egfr_creatinine, r.value as creatinine_mg_dl, r.birth_year
    from measures_known as m
    join results_known as r
        on r.source_id = m.source_id and r.file_id = m.file_id and r.line_no = m.line_no
    where m.analyte = 'creatinine'
      and m.egfr_creatinine is not null
      and m.age_years >= $adult_min_age
      and m.collected_date > $period_end - to_months(cast($window_months as integer))
),
latest as (
    select person_key, max(day) as day
    from window_creatinine
    group by person_key
)
select p.district_code, w.person_key, w.day as collected_date, w.sex, w.age_years, w.birth_year, w.egfr,
       w.egfr_equation, w.egfr_creatinine, w.creatinine_mg_dl
from window_creatinine as w
join latest as l on l.person_key = w.person_key and l.day = w.day
join person_status as p on p.person_key = w.person_key and p.period = $period
order by w.person_key
