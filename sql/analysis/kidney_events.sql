-- kidney_events: one row per person and rule that has a qualifying run, as known at the period
-- end. Rules are rows of reference.trajectory_rules (from config/pipeline.yaml, "trajectories"):
--   sustained decline at t: consecutive daily eGFRs after the baseline window, every one at or
--     below (1 - t) x baseline, spanning at least 28 days from first to last value;
--   progression (KDIGO 2012): consecutive daily eGFRs after the baseline window, every one in a
--     worse G category than the baseline AND at least $progression_fraction below it, spanning
--     at least progression_min_span_days (90 by default: a fall from AKI or a fluctuation that
--     recovers is not progression);
--   kidney failure: consecutive daily eGFRs below 15 spanning at least 28 days;
--   CKD (eGFR): consecutive daily eGFRs below 60 spanning at least 90 days;
--   CKD (ACR): consecutive days whose albuminuria is certainly A2 or above, in the KDIGO category
--     of the unit reported (is_at_or_above_a2), spanning at least 90 days; a day whose censored
--     values leave it open is left out (neither counts nor breaks the run).
-- Baseline eGFR = mean of the daily eGFRs within 90 days of the person's first one, per equation
-- family: a baseline taken under a children's equation is never compared with adult values;
-- the first adult value (at $adult_min_age) starts a new baseline. Decline and progression runs
-- do not cross from one family to the other.
-- Event date = first day of the first run that reaches the span; confirmation date = the first
-- day on which it reached the span. A run that qualifies but is still short of the span and ends
-- at the person's latest value is 'pending': a later month's value can confirm or break it.
-- Also (KDIGO 2012):
--   rapid decline: least-squares slope of the daily eGFRs of one equation family below
--     -$rapid_slope per year, over at least $rapid_min_values daily values spanning at least
--     $rapid_min_span_days days (the earliest family that qualifies);
--   new-onset albuminuria among people with lab-evidenced diabetes: the first measured A2 or A3
--     after diabetes was evidenced, when there was none on or before that day. Diabetes is
--     evidenced on the day the person has $diabetes_min_results abnormal results (2, ADA
--     Standards of Care: on one day from two different tests, or on two days; 1 with the
--     setting diabetes_rule: single).
with daily as (
    select * from daily_values_averaged
),
first_egfr as (
    select person_key, equation_family, min(day) as first_day
    from daily where measure = 'egfr' group by person_key, equation_family
),
baseline_mean as (
    select d.person_key, d.equation_family,
           avg(d.value) as baseline_egfr,
           f.first_day + cast($baseline_window_days as integer) as baseline_end
    from daily as d
    join first_egfr as f on f.person_key = d.person_key and f.equation_family = d.equation_family
    where d.measure = 'egfr' and d.day <= f.first_day + cast($baseline_window_days as integer)
    group by d.person_key, d.equation_family, f.first_day
),
baseline as (
    -- with the lower bound of the baseline's G category: a value below it is in a worse one
    select b.*, g.lower_bound as baseline_g_lower
    from baseline_mean as b
    left join reference.gfr_categories_ordered as g
        on b.baseline_egfr >= g.lower_bound and b.baseline_egfr < g.upper_bound
),
in_scope as not materialized (
    -- the values each rule looks at (decline rules only look after the baseline window);
    -- not materialized: joined again below rather than written out (rules x daily values rows)
    select r.rule_id, r.event_type, r.threshold, r.min_span_days,
           d.person_key, d.day, d.value, d.equation_family, b.baseline_egfr,
           -- rules against the baseline run within one equation family
           case when r.after_baseline then d.equation_family else '' end as segment,
           case r.comparison
               when 'at_or_below_fraction_of_baseline'
                   -- 1e-9: (1 - 0.3) x 90 is 62.99999999999999 in binary floating point
                   then d.value <= (1 - r.threshold) * b.baseline_egfr + 1e-9
               when 'worse_category_and_fraction_of_baseline'
                   then d.value < b.baseline_g_lower
                        and d.value <= (1 - r.threshold) * b.baseline_egfr + 1e-9
               when 'below' then d.value < r.threshold
               when 'at_or_above' then d.value >= r.threshold
               when 'at_or_above_a2' then d.is_at_or_above_a2
           end as qualifies
    from reference.trajectory_rules as r
    join daily as d on d.measure = r.measure
    left join baseline as b on b.person_key = d.person_key and b.equation_family = d.equation_family
    where (not r.after_baseline or (b.baseline_end is not null and d.day > b.baseline_end))
      and (r.comparison <> 'at_or_above_a2' or d.is_at_or_above_a2 is not null)
),
candidates as (
    -- only a person and rule with at least one qualifying value can have a run: most persons
    -- never reach a decline or failure threshold, and their values need no islands
    select rule_id, person_key from in_scope group by rule_id, person_key having bool_or(qualifies)
),
islands as (
    select s.*,
           -- a day can hold a value of each equation family (labs sending other birth years for
           -- one person): its non-qualifying value comes first, so such a day ends a run, and
           -- the order is the same whatever order the rows arrive in
           sum(case when s.qualifies then 0 else 1 end) over (
               partition by s.rule_id, s.person_key, s.segment
               order by s.day, s.qualifies, s.equation_family rows unbounded preceding
           ) as island,
           max(s.day) over (partition by s.rule_id, s.person_key) as last_day
    from in_scope as s
    semi join candidates as c on c.rule_id = s.rule_id and c.person_key = s.person_key
),
runs as (
    select rule_id, event_type, threshold, min_span_days, person_key, segment, island,
           -- the baseline of the run's first value (a run of a rule not judged against the
           -- baseline can hold both families; on a day with both, the adult one)
           first(baseline_egfr order by (baseline_egfr is null), day, equation_family <> 'adult')
               as baseline_egfr,
           min(day) as run_start,
           max(day) as run_end,
           any_value(last_day) as last_day,
           count(*) as n_values,
           list(round(value, 1) order by day, equation_family) as run_values,
           min(day) filter (where day - min_day >= min_span_days) as confirmation_date
    from (select *, min(day) over (partition by rule_id, person_key, segment, island) as min_day
          from islands where qualifies)
    group by rule_id, event_type, threshold, min_span_days, person_key, segment, island
),
ranked as (
    select *,
           row_number() over (
               partition by rule_id, person_key
               order by (confirmation_date is null), run_start, segment, island
           ) as pick
    from runs
    where confirmation_date is not null or run_end = last_day
),
run_events as (
    select
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
        run_values,
        cast(null as double) as slope_ml_min_per_year,
        cast(null as integer) as days_since_diabetes
    from ranked
    where pick = 1
),
slopes as (
    select person_key, equation_family,
           regr_slope(value, (day - date '2000-01-01') / 365.25) as slope,
           count(*) as n_values,
           min(day) as first_day,
           max(day) as last_day,
           list(round(value, 1) order by day) as run_values
    from daily
    where measure = 'egfr'
    group by person_key, equation_family
),
rapid as (
    select s.person_key, 'rapid_decline' as event_type, 'rapid_decline' as rule_id,
           -cast($rapid_slope as double) as threshold, 'confirmed' as event_status,
           round(b.baseline_egfr, 2) as baseline_egfr, s.first_day as event_date,
           s.last_day as confirmation_date, s.last_day as last_qualifying_date, s.n_values,
           s.run_values, round(s.slope, 2) as slope_ml_min_per_year,
           cast(null as integer) as days_since_diabetes
    from slopes as s
    left join baseline as b on b.person_key = s.person_key and b.equation_family = s.equation_family
    where s.n_values >= $rapid_min_values
      and s.last_day - s.first_day >= $rapid_min_span_days
      and s.slope < -cast($rapid_slope as double)
    qualify row_number() over (partition by s.person_key order by s.first_day, s.equation_family) = 1
),
abnormal_glycaemia as (
    -- ADA Standards of Care thresholds, compared in the unit the lab reported; a censored value
    -- counts only when it is certainly at or above the threshold (">X" or ">=X" with X at or
    -- above it; "<X" never)
    select person_key, collected_date as day, analyte
    from results_known
    where comparator is distinct from '<' and comparator is distinct from '<='
      and ((analyte = 'hba1c' and ((reported_unit = '%' and reported_value >= $hba1c_percent)
                                or (reported_unit = 'mmol/mol' and reported_value >= $hba1c_mmol_mol)))
        or (analyte = 'glucose' and is_fasting and ((reported_unit = 'mg/dL' and reported_value >= $glucose_mg_dl)
                                or (reported_unit = 'mmol/L' and reported_value >= $glucose_mmol_l))))
),
glycaemia_days as (
    -- per day: how many different tests were abnormal, and how many abnormal days came before
    select person_key, day, count(distinct analyte) as tests,
           row_number() over (partition by person_key order by day) - 1 as earlier_days
    from abnormal_glycaemia
    group by person_key, day
),
diabetes as (
    -- the day the person reaches $diabetes_min_results abnormal results: two tests on one day,
    -- or a second abnormal day
    select person_key, min(day) as diabetes_date
    from glycaemia_days
    where tests >= $diabetes_min_results or earlier_days + 1 >= $diabetes_min_results
    group by person_key
),
albuminuric as (
    select person_key, collected_date as day, acr_mg_g, aer_mg_24h
    from measures_known
    where is_at_or_above_a2 and not is_acr_estimated
),
new_onset as (
    select x.person_key, 'new_onset_albuminuria' as event_type, 'new_onset_albuminuria' as rule_id,
           cast(null as double) as threshold, 'confirmed' as event_status,
           cast(null as double) as baseline_egfr, min(a.day) as event_date,
           min(a.day) as confirmation_date, min(a.day) as last_qualifying_date, 1 as n_values,
           -- the first day's value (of two on that day, the lower: the same whatever the order)
           [round(arg_min(coalesce(a.acr_mg_g, a.aer_mg_24h),
                          (a.day, coalesce(a.acr_mg_g, a.aer_mg_24h))), 1)] as run_values,
           cast(null as double) as slope_ml_min_per_year,
           cast(min(a.day) - any_value(x.diabetes_date) as integer) as days_since_diabetes
    from diabetes as x
    join albuminuric as a on a.person_key = x.person_key and a.day > x.diabetes_date
    where not exists (
        select 1 from albuminuric as e where e.person_key = x.person_key and e.day <= x.diabetes_date
    )
    group by x.person_key
)
select $period as period, * from (
    select * from run_events
    union all by name select * from rapid
    union all by name select * from new_onset
)
order by person_key, rule_id
