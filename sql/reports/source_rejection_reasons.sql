-- source_rejection_reasons: rejected rows per lab source, extract month and reason code, with
-- the first file:line of each to look at (reason codes in DEVELOPERS.md).
select
    $period as period,
    r.source_id,
    f.extract_month,
    r.reason_code,
    count(*) as rows,
    min(r.file_path || ':' || r.line_no::varchar order by r.file_id, r.line_no) as example_line
from rejected_rows as r
join ingest_files as f on f.file_id = r.file_id
group by r.source_id, f.extract_month, r.reason_code
order by r.source_id, f.extract_month, rows desc, r.reason_code
