-- How many known eGFRs, and of how many persons, the equation comparison recomputes: every
-- person's when $all_persons, else those of comparison_persons (the persons the link stage
-- computed anew; put in front by sql_over). Sizes the person-key ranges of
-- build_comparison_ckd (pipeline/stages/summarise.py).
with scoped as (
    select person_key
    from measures_known
    where egfr is not null
      and ($all_persons or person_key in (select person_key from comparison_persons))
)
select count(*) as egfr_rows, count(distinct person_key) as persons
from scoped
