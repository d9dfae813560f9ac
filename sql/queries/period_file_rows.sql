-- Rows of the files ingested for $period (ingest_files.run_period), per source and outcome;
-- rows of held-back files are counted as held_back.
select source_id,
       count(*) as files,
       sum(rows_read) as read,
       sum(rows_accepted) filter (where status <> 'held_back') as accepted,
       sum(rows_rejected) filter (where status <> 'held_back') as rejected,
       sum(rows_superseded) filter (where status <> 'held_back') as superseded,
       sum(rows_duplicate) filter (where status <> 'held_back') as duplicate,
       sum(rows_withdrawn) filter (where status <> 'held_back') as withdrawn,
       sum(rows_pending) filter (where status <> 'held_back') as pending,
       sum(rows_read) filter (where status = 'held_back') as held_back
from ingest_files
where run_period = $period
group by source_id
order by source_id

