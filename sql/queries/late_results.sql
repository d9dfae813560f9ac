-- Per other published period (runs), the versions stored by this run's files (temporary table
-- landed_files) that a revision of that period would take: not duplicates, not preliminary,
-- collected and reported by that period's end. $p: this run's period.
with earlier as (
    select distinct period, last_day(strptime(period || '-01', '%Y-%m-%d'))::date as period_end
    from runs where period <> $p
)
select e.period, count(*) as results
from earlier as e
join result_versions as v
  on v.file_id in (select file_id from landed_files)
 and v.collected_date <= e.period_end and v.reported_date <= e.period_end
where v.outcome <> 'duplicate' and v.status <> 'preliminary'
group by e.period order by e.period

