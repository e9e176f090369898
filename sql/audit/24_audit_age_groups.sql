-- Published: samples by age group per unit and period (derived.age_group, from the exported
-- age or else the birth date at collection): adults, age unknown (no age and no birth date:
-- adult targets are applied to them and they are counted in the adult rates), children and
-- neonates. Children and neonates are outside the adult oxygenation rates: the adult targets,
-- the adult A-a formula and the saturation curve check do not apply to them.
-- adults + age_unknown + children + neonates = samples (a partition, 06_audit_partition.sql).
-- Places as in audit_rates (a unit, all units of a type, all units).
-- Grain: one row per unit (or all units) and period (or all periods) with any sample in the
-- reporting window. Suppressed counts are NULL and named in suppressed_columns.
create or replace table audit_age_groups as
with pivoted as (
    select
        unit,
        unit_type,
        any_value(unit_label) as unit_label,
        period_start,
        max(case when family = 'samples' then value end) as samples,
        max(case when family = 'samples' and hidden then 1 else 0 end) = 1 as samples_hidden,
        max(case when family = 'age_adult' then value end) as adults,
        max(case when family = 'age_adult' and hidden then 1 else 0 end) = 1 as adults_hidden,
        max(case when family = 'age_unknown' then value end) as age_unknown,
        max(case when family = 'age_unknown' and hidden then 1 else 0 end) = 1 as age_unknown_hidden,
        max(case when family = 'age_child' then value end) as children,
        max(case when family = 'age_child' and hidden then 1 else 0 end) = 1 as children_hidden,
        max(case when family = 'age_neonate' then value end) as neonates,
        max(case when family = 'age_neonate' and hidden then 1 else 0 end) = 1 as neonates_hidden
    from audit_cell
    where family in ('samples', 'age_adult', 'age_unknown', 'age_child', 'age_neonate')
    group by unit, unit_type, period_start
)
select
    v.unit_label as unit,
    v.unit_type,
    v.unit is null as all_units,
    p.period,
    v.period_start,
    v.period_start is null as all_periods,
    case when not v.samples_hidden then v.samples end as samples,
    case when not v.adults_hidden then v.adults end as adults,
    case when not v.age_unknown_hidden then v.age_unknown end as age_unknown,
    case when not v.children_hidden then v.children end as children,
    case when not v.neonates_hidden then v.neonates end as neonates,
    nullif(concat_ws(', ',
        case when v.samples_hidden then 'samples' end,
        case when v.adults_hidden then 'adults' end,
        case when v.age_unknown_hidden then 'age_unknown' end,
        case when v.children_hidden then 'children' end,
        case when v.neonates_hidden then 'neonates' end
    ), '') as suppressed_columns
from pivoted as v
join audit_period as p on p.period_start is not distinct from v.period_start
order by all_units, v.unit_type nulls last, unit, all_periods, v.period_start;
