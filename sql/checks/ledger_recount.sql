-- Recount the outcomes of each file in temp table recount_files from the rows they left:
-- result_versions (accepted, superseded, duplicate, withdrawn, pending) and rejected_rows.
-- Every ingested file must then balance (ledger_unbalanced.sql): rows read = the sum of outcomes.
update ingest_files set
    rows_accepted = c.accepted,
    rows_superseded = c.superseded,
    rows_duplicate = c.duplicate,
    rows_withdrawn = c.withdrawn,
    rows_pending = c.pending,
    rows_rejected = c.rejected
from (
    select f.file_id,
           count(v.line_no) filter (where v.outcome = 'accepted') as accepted,
           count(v.line_no) filter (where v.outcome = 'superseded') as superseded,
           count(v.line_no) filter (where v.outcome = 'duplicate') as duplicate,
           count(v.line_no) filter (where v.outcome = 'withdrawn') as withdrawn,
           count(v.line_no) filter (where v.outcome = 'pending') as pending,
           coalesce(any_value(r.rejected), 0) as rejected
    from ingest_files as f
    left join result_versions as v on v.file_id = f.file_id
    left join (select file_id, count(*) as rejected from rejected_rows group by file_id) as r
        on r.file_id = f.file_id
    where f.status = 'ingested'
      and f.file_id in (select file_id from recount_files)
    group by f.file_id
) as c
where ingest_files.file_id = c.file_id
