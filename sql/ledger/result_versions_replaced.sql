-- result_versions_replaced: the stored rows a reprocess replaced (kidneysurv reprocess), kept
-- as superseded versions: nothing is deleted. Same columns as result_versions (outcome is
-- 'superseded'), with the reprocess that replaced them and the outcome they had until then.
create table if not exists result_versions_replaced as
select cast(null as varchar) as reprocess_id, cast(null as varchar) as outcome_before, *
from result_versions
limit 0;
