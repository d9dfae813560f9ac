-- The quality gate's batch totals (pipeline/stages/quality_gate.py): one row per source with
-- rows in the run: its well-formed and rejected rows, the rows its files read, and the rows whose
-- row id (file_id:line_no) occurs more than once. batch_rows (the run's judged rows) and
-- batch_files (the ids of the run's files: those it landed, as a reprocess lands earlier files
-- again, else every file from the batch's first on) are given by the caller.
with batch as (
    select source_id,
           count(*) filter (where reason_code is null) as rows,
           count(*) filter (where reason_code is not null) as rejected
    from batch_rows group by source_id
),
copies as (
    select source_id, sum(n) as duplicate_row_ids
    from (select source_id, file_id, line_no, count(*) as n
          from batch_rows where reason_code is null
          group by source_id, file_id, line_no having count(*) > 1)
    group by source_id
),
files as (
    select source_id, sum(rows_read) as rows_read
    from ingest_files
    where status <> 'duplicate_file' and file_id in (select file_id from batch_files)
    group by source_id
)
select b.source_id, b.rows, b.rejected, b.rows + b.rejected as rows_landed,
       coalesce(f.rows_read, 0)::bigint as rows_read,
       coalesce(c.duplicate_row_ids, 0)::bigint as duplicate_row_ids
from batch as b
left join files as f on f.source_id = b.source_id
left join copies as c on c.source_id = b.source_id
order by b.source_id
