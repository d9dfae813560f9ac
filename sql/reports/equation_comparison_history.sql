-- equation_comparison_history (transient, person-level: a temporary table, never kept): every
-- eGFR known at the period end with what recomputing it under another creatinine equation needs
-- (the creatinine in mg/dL, age at test, sex, the equation used). Input of the confirmed-CKD
-- count under the comparison equation (pipeline/core/equation_impact.py).
with known_egfr as (
    select m.person_key, m.collected_date, m.analyte, m.sex, m.age_years, m.egfr, m.egfr_equation,
           m.source_id, m.file_id, m.line_no
    from measures_known as m
    where m.egfr is not null
)
select k.person_key, k.collected_date, k.analyte, k.sex, k.age_years, k.egfr, k.egfr_equation,
       r.value as creatinine_mg_dl, r.birth_year
from known_egfr as k
left join results_known as r
    on r.source_id = k.source_id and r.file_id = k.file_id and r.line_no = k.line_no
   and k.analyte = 'creatinine'
order by k.person_key, k.collected_date
