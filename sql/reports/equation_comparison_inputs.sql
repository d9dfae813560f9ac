-- equation_comparison_inputs (transient, person-level: built as a temporary table, never kept):
-- for each adult with a creatinine eGFR collected in the $window_months months ending at the
-- period end, the creatinine results of their latest such day, with the eGFR under the equation
-- in force (creatinine alone, and the creatinine-cystatin C one where it was used that day) and
-- what the comparison equation needs (creatinine in mg/dL, age at test, sex). Input of
-- district_equation_change (pipeline/core/equation_impact.py).
with window_creatinine as (
    select person_key, collected_date as day, sex, age_years, egfr, egfr_equation, egfr_creatinine,
           source_id, file_id, line_no
    from measures_known
    where analyte = 'creatinine'
      and egfr_creatinine is not null
      and age_years >= $adult_min_age
      and collected_date > $period_end - to_months(cast($window_months as integer))
),
latest as (
    -- the latest day's rows, then their results (joining the results of the latest day only is
    -- three times faster than joining every creatinine of the window; a measure row is made from
    -- its own accepted result, so each has one)
    select *
    from window_creatinine
    qualify day = max(day) over (partition by person_key)
)
select p.district_code, l.person_key, l.day as collected_date, l.sex, l.age_years, r.birth_year, l.egfr,
       l.egfr_equation, l.egfr_creatinine, r.value as creatinine_mg_dl
from latest as l
join results_known as r
    on r.source_id = l.source_id and r.file_id = l.file_id and r.line_no = l.line_no
join person_status as p on p.person_key = l.person_key and p.period = $period
order by l.person_key
