-- equation_comparison_history (transient, person-level: a temporary table, never kept): every
-- eGFR known at the period end with what recomputing it under another creatinine equation needs
-- (the creatinine in mg/dL, age at test, sex, the equation used), for the persons whose key lies
-- in [$lower, $upper) and, unless $all_persons, who are in comparison_persons (the persons the
-- link stage computed anew; put in front by sql_over). Input of the confirmed-CKD count under
-- the comparison equation (pipeline/core/equation_impact.py).
with known_egfr as (
    select m.person_key, m.collected_date, m.analyte, m.sex, m.age_years, m.egfr, m.egfr_equation,
           m.source_id, m.file_id, m.line_no
    from measures_known as m
    where m.egfr is not null
      and m.person_key >= $lower and m.person_key < $upper
      and ($all_persons or m.person_key in (select person_key from comparison_persons))
)
select k.person_key, k.collected_date, k.analyte, k.sex, k.age_years, k.egfr, k.egfr_equation,
       r.value as creatinine_mg_dl, r.birth_year
from known_egfr as k
left join results_known as r
    on r.source_id = k.source_id and r.file_id = k.file_id and r.line_no = k.line_no
   and k.analyte = 'creatinine'
   and r.person_key >= $lower and r.person_key < $upper
order by k.person_key, k.collected_date
