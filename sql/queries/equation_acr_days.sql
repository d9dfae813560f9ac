-- The ACR days of daily_values_averaged, in the columns of the daily values recomputed under the
-- comparison equation (summarise: build_equation_change).
select person_key, measure, day, value, n_results::bigint as n_results,
       equation_family, is_at_or_above_a2
from daily_values_averaged
where measure = 'acr'
