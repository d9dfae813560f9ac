-- Files whose rows do not balance: every row read must end accepted, rejected, superseded,
-- duplicate, withdrawn or pending. A run stops when this returns a row.
select file_path, rows_read,
       rows_accepted + rows_rejected + rows_superseded + rows_duplicate
       + rows_withdrawn + rows_pending as accounted
from ingest_files
where status in ('ingested', 'duplicate_file')
  and rows_read <> rows_accepted + rows_rejected + rows_superseded + rows_duplicate
                   + rows_withdrawn + rows_pending
order by file_id
