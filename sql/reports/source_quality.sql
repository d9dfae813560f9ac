-- source_quality: one row per lab source and extract month, from the ledger: files, rows by
-- outcome and the share rejected. Read with source_rejection_reasons and lab_egfr_agreement.
select
    $period as period,
    source_id,
    extract_month,
    count(*) filter (where status in ('ingested', 'duplicate_file')) as files,
    count(*) filter (where status = 'held_back') as files_held_back,
    coalesce(sum(rows_read) filter (where status in ('ingested', 'duplicate_file')), 0)::bigint as rows_read,
    sum(rows_accepted)::bigint as rows_accepted,
    sum(rows_rejected)::bigint as rows_rejected,
    sum(rows_superseded)::bigint as rows_superseded,
    sum(rows_duplicate)::bigint as rows_duplicate,
    sum(rows_withdrawn)::bigint as rows_withdrawn,
    sum(rows_pending)::bigint as rows_pending,
    round(sum(rows_rejected) / nullif(sum(rows_read) filter (where status in ('ingested', 'duplicate_file')), 0), 4)
        as rejected_share
from ingest_files
group by source_id, extract_month
order by source_id, extract_month
