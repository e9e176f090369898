-- Published: every rate of audit_measure per unit and period, with numerator, denominator and
-- the Wilson 95 % interval (wilson_lower / wilson_upper), and the measure's definition (numerator
-- and denominator in words). A rate, and its interval, is shown
-- only when both of its counts are; rate NULL with nothing suppressed means no denominator.
-- question and level from audit_measure; unit_type is the unit's type (NULL for the site row);
-- a row for all units of one type is labelled 'All <type> units'. partial_period: the period
-- is still under way (audit_window), so its counts are incomplete.
-- Grain: one row per measure, place (unit, all units of a type, or all units) and period (or
-- all periods).
create or replace table audit_rates as
select
    m.sort_order,
    m.measure,
    m.title,
    m.basis,
    m.definition,
    m.question,
    m.level,
    x.unit_label as unit,
    x.unit_type,
    x.unit is null as all_units,
    p.period,
    x.period_start,
    x.period_start is null as all_periods,
    p.partial as partial_period,
    case when not x.hidden then x.value end as numerator,
    case when not n.hidden then n.value end as denominator,
    case when not x.hidden and not n.hidden and n.value > 0 then cast(x.value as double) / n.value end as rate,
    case when not x.hidden and not n.hidden then wilson_lower(x.value, n.value) end as ci_low,
    case when not x.hidden and not n.hidden then wilson_upper(x.value, n.value) end as ci_high,
    nullif(concat_ws(', ',
        case when x.hidden then 'numerator' end,
        case when n.hidden then 'denominator' end,
        case when x.hidden or n.hidden then 'rate, ci_low, ci_high' end
    ), '') as suppressed_columns
from audit_measure as m
join audit_cell as x on x.family = m.numerator_family
join audit_cell as n
    on n.family = m.denominator_family
   and n.unit is not distinct from x.unit
   and n.unit_type is not distinct from x.unit_type
   and n.period_start is not distinct from x.period_start
join audit_period as p on p.period_start is not distinct from x.period_start
order by m.sort_order, all_units, x.unit_type nulls last, unit, all_periods, x.period_start;
