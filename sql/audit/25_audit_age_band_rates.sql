-- Published: the hypoxaemia, above-target-on-oxygen and within-prescribed-target rates of
-- audit_rates split by adult age band (audit_age_band_family), per place and period, with
-- the Wilson 95 % interval, so that a unit with older patients is compared band by band.
-- Definitions as for the measure in audit_rates, restricted to the band.
-- Places as in audit_rates (a unit, all units of a type, all units).
-- Grain: one row per measure, age band, place and period (or all periods).
create or replace table audit_age_band_rates as
select
    m.sort_order,
    r.measure,
    m.title,
    b.age_band,
    b.band_order,
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
from audit_age_band_rate as r
join audit_measure as m on m.measure = r.measure
join audit_age_band_family as b on b.base_family = r.numerator_family
join audit_cell as x on x.family = b.family
join audit_cell as n
    on n.family = r.denominator_family || '@' || b.age_band
   and n.unit is not distinct from x.unit
   and n.unit_type is not distinct from x.unit_type
   and n.period_start is not distinct from x.period_start
join audit_period as p on p.period_start is not distinct from x.period_start
order by m.sort_order, b.band_order, all_units, x.unit_type nulls last, unit, all_periods, x.period_start;
