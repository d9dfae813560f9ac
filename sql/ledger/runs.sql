-- runs: one row per published run (the run manifest; the same JSON is in
-- out/<period>/run_manifest.json). A run that fails leaves no row: its transaction is undone.
-- revision: the release of the period this run published (1 the first; pipeline/run/revisions.py).
create table if not exists runs (
    run_id          varchar primary key,
    period          varchar not null,
    started_at      timestamp not null,
    status          varchar not null,
    exit_code       integer not null,
    package_version varchar not null,
    git_commit      varchar,
    config_sha256   varchar not null,
    demo_key        boolean not null,
    manifest        json not null,
    revision        integer,
    revision_reason varchar
);
