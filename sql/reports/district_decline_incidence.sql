-- district_decline_incidence: sustained eGFR decline per district (and 'ALL'), one column set
-- per threshold (30 %, 40 %, 57 %; one row per district so that suppression is decided once per
-- count): confirmed events whose event date falls in the $window_months months ending at the
-- period end, per 1,000 persons with an eGFR in that window and per 1,000 person-years.
-- Follow-up of a person = days from their first to their last daily eGFR within the window
-- (persons with one eGFR in the window add none), in years of 365.25 days.
with window_egfr as (
    select person_key, min(day) as first_day, max(day) as last_day
    from daily_values_averaged
    where measure = 'egfr' and day > $period_end - to_months(cast($window_months as integer))
    group by person_key
),
persons as (
    select p.person_key, p.district_code, (w.last_day - w.first_day) / 365.25 as years
    from window_egfr as w
    join person_status as p on p.person_key = w.person_key and p.period = $period
),
events as (
    select e.person_key,
           bool_or(e.rule_id = 'sustained_decline_30') as d30,
           bool_or(e.rule_id = 'sustained_decline_40') as d40,
           bool_or(e.rule_id = 'sustained_decline_57') as d57
    from kidney_events as e
    where e.period = $period and e.event_type = 'sustained_decline' and e.event_status = 'confirmed'
      and e.event_date > $period_end - to_months(cast($window_months as integer))
    group by e.person_key
),
by_district as (
    select p.district_code,
           count(*) as persons_tested,
           sum(p.years) as person_years,
           count(*) filter (where ev.d30) as persons_decline_30,
           count(*) filter (where ev.d40) as persons_decline_40,
           count(*) filter (where ev.d57) as persons_decline_57
    from persons as p
    left join events as ev on ev.person_key = p.person_key
    group by grouping sets ((p.district_code), ())
)
select
    $period as period,
    coalesce(district_code, 'ALL') as district_code,
    persons_tested,
    round(person_years, 1) as person_years,
    persons_decline_30,
    persons_decline_40,
    persons_decline_57,
    round(1000.0 * persons_decline_30 / nullif(persons_tested, 0), 2) as decline_30_per_1000_tested,
    round(1000.0 * persons_decline_40 / nullif(persons_tested, 0), 2) as decline_40_per_1000_tested,
    round(1000.0 * persons_decline_57 / nullif(persons_tested, 0), 2) as decline_57_per_1000_tested,
    round(1000.0 * persons_decline_30 / nullif(person_years, 0), 2) as decline_30_per_1000_person_years,
    round(1000.0 * persons_decline_40 / nullif(person_years, 0), 2) as decline_40_per_1000_person_years,
    round(1000.0 * persons_decline_57 / nullif(person_years, 0), 2) as decline_57_per_1000_person_years
from by_district
order by district_code is null, district_code
