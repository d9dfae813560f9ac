-- results_known: the accepted results as known at the period end ($period_end): for each
-- result, the latest version reported by then, if it is final, amended or corrected, collected
-- by then, and not the same result already received from another source. The as-of twin of
-- lab_results; every person-level table of a period reads this, not lab_results.
-- When no version in result_versions is reported after the period end (the usual monthly run),
-- the outcomes as known then are the stored ones, and pipeline/stages/link/persons.py takes the accepted
-- rows of result_versions collected by the period end directly (the same rows, without
-- settling the versions a second time).
select v.*
from result_versions as v
join versions_as_of as k on k.file_id = v.file_id and k.line_no = v.line_no
where k.outcome = 'accepted' and v.collected_date <= $period_end
