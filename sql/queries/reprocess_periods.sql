-- The published periods (runs) a reprocess touches: from the month of the earliest collection
-- date among the new and the replaced rows of the reprocessed files ($id: the reprocess).
select distinct period
from runs
where period >= (
    select strftime(min(collected_date), '%Y-%m')
    from (
        select collected_date from result_versions
        where file_id in (select file_id from reprocess_files)
        union all
        select collected_date from result_versions_replaced where reprocess_id = $id
    )
)
order by 1
