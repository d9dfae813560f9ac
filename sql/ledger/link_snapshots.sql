-- link_snapshots: one row per period whose person-level tables (kidney_events, person_status)
-- were built: which files were in the warehouse then, and a fingerprint of the rules, settings
-- and code that made them. The next month's run recomputes events only for the persons whose
-- results changed since the latest snapshot (pipeline/stages/link/persons.py), and only when the
-- fingerprint is the same; otherwise it recomputes every person.
create table if not exists link_snapshots (
    period             varchar primary key,
    period_end         date not null,
    max_file_id        bigint not null,
    fingerprint        varchar not null,
    persons            bigint not null,
    persons_recomputed bigint not null
);
