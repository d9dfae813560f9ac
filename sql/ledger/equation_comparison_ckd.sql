-- equation_comparison_ckd: per period, the persons with confirmed CKD when every adult creatinine
-- eGFR made by the equation in force is recomputed under the comparison equation and the CKD rules
-- are run again (summarise: build_equation_change). Kept so that the next month recomputes only the
-- persons whose results changed, as the link stage does for kidney_events. Person-level and
-- internal: never exported, read only for the counts of district_equation_change.
create table if not exists equation_comparison_ckd (
    period     varchar not null,
    comparison varchar not null,
    person_key varchar not null
);
