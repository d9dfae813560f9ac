-- The ACR days of daily_values_averaged, in the columns of the daily values recomputed under the
-- comparison equation (summarise: build_equation_change), for the persons whose key lies in
-- [$lower, $upper) and, unless $all_persons, who are in comparison_persons (put in front by
-- sql_over).
with acr_days as (
    select person_key, measure, day, value, n_results::bigint as n_results,
           equation_family, is_at_or_above_a2
    from daily_values_averaged
    where measure = 'acr'
      and person_key >= $lower and person_key < $upper
      and ($all_persons or person_key in (select person_key from comparison_persons))
)
select * from acr_days
