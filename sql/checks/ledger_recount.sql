-- The outcome counts of the ingested files a run touched, recounted from the versions it stored
-- and the rows it rejected: every ingested file when $all_files, else those in touched_files
-- (the files of the versions the run settled and the files it landed; given by the caller).
-- The validate stage writes them into ingest_files (pipeline/stages/validate.py).
with counted as (
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
      and ($all_files or f.file_id in (select file_id from touched_files))
    group by f.file_id
)
select * from counted
