-- Published: share of samples flagged by each data-quality or documentation rule, per unit and period, with
-- the Wilson 95 % interval; the denominator is every sample in the unit and period.
-- Places as in audit_rates (a unit, all units of a type, all units).
-- Grain: one row per data-quality or documentation rule, unit (or all units) and period (or all periods).
create or replace table audit_flag_rates as
select
    c.rule_id,
    c.title as rule_title,
    c.severity as default_severity,
    x.unit_label as unit,
    x.unit_type,
    x.unit is null as all_units,
    p.period,
    x.period_start,
    x.period_start is null as all_periods,
    case when not x.hidden then x.value end as flagged_samples,
    case when not n.hidden then n.value end as samples,
    case when not x.hidden and not n.hidden and n.value > 0 then cast(x.value as double) / n.value end as rate,
    case when not x.hidden and not n.hidden then wilson_lower(x.value, n.value) end as ci_low,
    case when not x.hidden and not n.hidden then wilson_upper(x.value, n.value) end as ci_high,
    nullif(concat_ws(', ',
        case when x.hidden then 'flagged_samples' end,
        case when n.hidden then 'samples' end,
        case when x.hidden or n.hidden then 'rate, ci_low, ci_high' end
    ), '') as suppressed_columns
from rule_catalogue as c
join audit_cell as x on x.family = 'flag:' || c.rule_id
join audit_cell as n
    on n.family = 'samples'
   and n.unit is not distinct from x.unit
   and n.unit_type is not distinct from x.unit_type
   and n.period_start is not distinct from x.period_start
join audit_period as p on p.period_start is not distinct from x.period_start
where c.kind in ('data_quality', 'documentation')
order by c.rule_id, all_units, x.unit_type nulls last, unit, all_periods, x.period_start;
