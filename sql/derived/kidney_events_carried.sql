-- The snapshot period's events of every person whose results did not change since it was built
-- (not in link_persons), relabelled to this period: the link stage's carry-over
-- (pipeline/stages/link/persons.py); the changed persons' events are added to them.
select * replace ($period as period) from kidney_events
where period = $snapshot and person_key not in (select person_key from link_persons)
