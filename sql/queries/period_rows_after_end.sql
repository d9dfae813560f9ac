-- Per source, the accepted rows of this run's files (landed_files: the ingest stage's table of
-- them, given by the caller) collected or reported after the period end ($period_end); only
-- sources with such rows.
with run_files as (select file_id from landed_files)
select v.source_id,
       count(*) as accepted,
       count(*) filter (where v.collected_date > $period_end
                           or v.reported_date > $period_end) as after_period_end,
       count(*) filter (where v.reported_date > $period_end) as reported_after,
       count(*) filter (where v.collected_date > $period_end) as collected_after
from result_versions as v
where v.outcome = 'accepted' and v.file_id in (select file_id from run_files)
group by v.source_id
having count(*) filter (where v.collected_date > $period_end
                           or v.reported_date > $period_end) > 0
order by v.source_id

