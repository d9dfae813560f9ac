-- kidney_events: one row per person and rule that has a qualifying run, as known at the period
-- end. Rules are rows of reference.trajectory_rules (from config/pipeline.yaml, "trajectories"):
--   sustained decline at t: consecutive daily eGFRs after the baseline window, every one at or
--     below (1 - t) x baseline, spanning at least 28 days from first to last value;
--   kidney failure: consecutive daily eGFRs below 15 spanning at least 28 days;
--   CKD (eGFR): consecutive daily eGFRs below 60 spanning at least 90 days;
--   CKD (ACR): consecutive daily ACRs at or above 30 mg/g spanning at least 90 days.
-- Baseline eGFR = mean of the daily eGFRs within 90 days of the person's first one.
-- Event date = first day of the first run that reaches the span; confirmation date = the first
-- day on which it reached the span. A run that qualifies but is still short of the span and ends
-- at the person's latest value is 'pending': a later month's value can confirm or break it.
with daily as (
    select * from int_daily_values_averaged
),
first_egfr as (
    select person_key, min(day) as first_day from daily where measure = 'egfr' group by person_key
),
baseline as (
    select d.person_key,
           avg(d.value) as baseline_egfr,
           f.first_day + cast($baseline_window_days as integer) as baseline_end
    from daily as d
    join first_egfr as f on f.person_key = d.person_key
    where d.measure = 'egfr' and d.day <= f.first_day + cast($baseline_window_days as integer)
    group by d.person_key, f.first_day
),
in_scope as (
    -- the values each rule looks at (decline rules only look after the baseline window)
    select r.rule_id, r.event_type, r.threshold, r.min_span_days,
           d.person_key, d.day, d.value, b.baseline_egfr,
           case r.comparison
               when 'at_or_below_fraction_of_baseline'
                   -- 1e-9: (1 - 0.3) x 90 is 62.99999999999999 in binary floating point
                   then d.value <= (1 - r.threshold) * b.baseline_egfr + 1e-9
               when 'below' then d.value < r.threshold
               when 'at_or_above' then d.value >= r.threshold
           end as qualifies
    from reference.trajectory_rules as r
    join daily as d on d.measure = r.measure
    left join baseline as b on b.person_key = d.person_key
    where not r.after_baseline or (b.baseline_end is not null and d.day > b.baseline_end)
),
islands as (
    select *,
           sum(case when qualifies then 0 else 1 end) over (
               partition by rule_id, person_key order by day rows unbounded preceding
           ) as island,
           max(day) over (partition by rule_id, person_key) as last_day
    from in_scope
),
runs as (
    select rule_id, event_type, threshold, min_span_days, person_key, island,
           any_value(baseline_egfr) as baseline_egfr,
           min(day) as run_start,
           max(day) as run_end,
           any_value(last_day) as last_day,
           count(*) as n_values,
           list(round(value, 1) order by day) as run_values,
           min(day) filter (where day - min_day >= min_span_days) as confirmation_date
    from (select *, min(day) over (partition by rule_id, person_key, island) as min_day
          from islands where qualifies)
    group by rule_id, event_type, threshold, min_span_days, person_key, island
),
ranked as (
    select *,
           row_number() over (
               partition by rule_id, person_key
               order by (confirmation_date is null), run_start
           ) as pick
    from runs
    where confirmation_date is not null or run_end = last_day
)
select
    $period as period,
    person_key,
    event_type,
    rule_id,
    threshold,
    case when confirmation_date is not null then 'confirmed' else 'pending' end as event_status,
    round(baseline_egfr, 2) as baseline_egfr,
    run_start as event_date,
    confirmation_date,
    run_end as last_qualifying_date,
    n_values,
    run_values
from ranked
where pick = 1
order by person_key, rule_id
