-- Published: P/F ratio bands (Berlin definition cut-offs 100, 200, 300 mmHg; berlin_band)
-- among included samples with a P/F ratio, per unit and period, each with its share and
-- Wilson 95 % interval. A band is an oxygenation category, not a diagnosis: the Berlin
-- definition also needs PEEP or CPAP >= 5 cmH2O and acute bilateral lung injury.
-- Places as in audit_rates (a unit, all units of a type, all units).
-- Grain: one row per band, unit (or all units) and period (or all periods).
create or replace table audit_pf_bands as
select
    b.sort_order,
    b.band,
    b.title,
    x.unit_label as unit,
    x.unit_type,
    x.unit is null as all_units,
    p.period,
    x.period_start,
    x.period_start is null as all_periods,
    case when not x.hidden then x.value end as samples_in_band,
    case when not n.hidden then n.value end as samples_with_pf,
    case when not x.hidden and not n.hidden and n.value > 0 then cast(x.value as double) / n.value end as share,
    case when not x.hidden and not n.hidden then wilson_lower(x.value, n.value) end as ci_low,
    case when not x.hidden and not n.hidden then wilson_upper(x.value, n.value) end as ci_high,
    nullif(concat_ws(', ',
        case when x.hidden then 'samples_in_band' end,
        case when n.hidden then 'samples_with_pf' end,
        case when x.hidden or n.hidden then 'share, ci_low, ci_high' end
    ), '') as suppressed_columns
from (
    values
        (1, 'severe', 'P/F <= 100 mmHg', 'pf_severe'),
        (2, 'moderate', 'P/F 101-200 mmHg', 'pf_moderate'),
        (3, 'mild', 'P/F 201-300 mmHg', 'pf_mild'),
        (4, 'above_300', 'P/F above 300 mmHg', 'pf_above_300')
) as b(sort_order, band, title, family)
join audit_cell as x on x.family = b.family
join audit_cell as n
    on n.family = 'pf_assessed'
   and n.unit is not distinct from x.unit
   and n.unit_type is not distinct from x.unit_type
   and n.period_start is not distinct from x.period_start
join audit_period as p on p.period_start is not distinct from x.period_start
order by all_units, x.unit_type nulls last, unit, all_periods, x.period_start, b.sort_order;
