-- reprocess_log: one row per file a reprocess applied (kidneysurv reprocess --apply): which
-- config its rows were made under before and after, and its outcome counts before and after.
create table if not exists reprocess_log (
    reprocess_id          varchar not null,
    reprocessed_at        timestamp not null,
    source_id             varchar not null,
    file_id               bigint not null,
    file_path             varchar not null,
    sha256                varchar not null,
    config_sha256_before  varchar,
    config_sha256_after   varchar not null,
    outcomes_before       json not null,
    outcomes_after        json not null,
    primary key (reprocess_id, file_id)
);
