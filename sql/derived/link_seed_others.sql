-- The versions that make the link stage's seed differ from the validate stage's: ingested since
-- the snapshot ($max_file_id) by another run than this one (this_run_files, given by the caller),
-- or ingested before it and reported between the two period ends. None in the usual month.
with others as (
    select file_id from result_versions
    where (file_id > $max_file_id and file_id not in (select file_id from this_run_files))
       or (file_id <= $max_file_id and reported_date > $snap_end and reported_date <= $period_end)
)
select count(*) as versions from others
