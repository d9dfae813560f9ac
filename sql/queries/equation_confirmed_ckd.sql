-- The persons with confirmed CKD among comparison_events: sql/analysis/kidney_events.sql run again
-- over the daily values under the comparison equation, put in front by sql_over (summarise:
-- build_equation_change).
with confirmed as (
    select distinct person_key
    from comparison_events
    where event_type = 'ckd' and event_status = 'confirmed'
)
select person_key from confirmed
