-- Every file version in the ledger with its hash and outcome counts, for the run manifest; the
-- last column (run_period) marks the ones this run ingested or held back.
select source_id, file_path, version, sha256, status, message, rows_read, rows_accepted,
       rows_rejected, rows_superseded, rows_duplicate, rows_withdrawn, rows_pending,
       run_period
from ingest_files order by file_id
