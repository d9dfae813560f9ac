-- ingest_file_entry: the ledger row of one file as the ingest stage records it
-- (pipeline/stages/ingest/landing.py inserts it into ingest_files by name); the outcome counts
-- beyond rows_read and rows_duplicate are the validate stage's recount.
select
    $file_id as file_id,
    $source_id as source_id,
    $file_path as file_path,
    $version as version,
    $sha256 as sha256,
    $size_bytes as size_bytes,
    $status as status,
    $message as message,
    $rows_read as rows_read,
    $rows_duplicate as rows_duplicate,
    $run_period as run_period,
    $extract_month as extract_month,
    current_timestamp as ingested_at,
    $config_sha256 as config_sha256,
    $file_stat as file_stat
