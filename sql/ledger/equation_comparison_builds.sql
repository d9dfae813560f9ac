-- equation_comparison_builds: one row per period whose equation_comparison_ckd rows were built:
-- the comparison, a fingerprint of the rules and code that made them, and how many persons were
-- computed anew. A month carries the rows of unchanged persons over from the period the link
-- stage carried its person tables from, only when that period's fingerprint is this run's.
create table if not exists equation_comparison_builds (
    period             varchar primary key,
    comparison         varchar not null,
    fingerprint        varchar not null,
    persons_recomputed bigint not null
);
