-- ingest_files: one row per input file version (the ledger). Counts are brought up to date by
-- every run, because a later file can supersede or withdraw the rows of an earlier one.
-- config_sha256: the source's config the file's rows were made under (pipeline/run/reprocess.py).
-- file_stat: the file's device, inode, size and times when it was hashed (null if it was then
-- changing); the next scan takes sha256 from here instead of reading a file whose status is the
-- same (pipeline/stages/ingest/inbox.py).
create table if not exists ingest_files (
    file_id          bigint primary key,
    source_id        varchar not null,
    file_path        varchar not null,
    version          integer not null,
    sha256           varchar not null,
    size_bytes       bigint not null,
    status           varchar not null,
    message          varchar,
    rows_read        bigint not null default 0,
    rows_accepted    bigint not null default 0,
    rows_rejected    bigint not null default 0,
    rows_superseded  bigint not null default 0,
    rows_duplicate   bigint not null default 0,
    rows_withdrawn   bigint not null default 0,
    rows_pending     bigint not null default 0,
    run_period       varchar not null,
    extract_month    varchar,
    ingested_at      timestamp not null,
    config_sha256    varchar,
    file_stat        varchar
);
