-- Published: sample and patient volume per unit and period, with the audit status split
-- (usable and caution samples are included in oxygenation rates; excluded ones are split by
-- reason: a sample type other than arterial, or a data-quality flag that excludes them).
-- Places as in audit_rates (a unit, all units of a type, all units).
-- Grain: one row per unit (or all units) and period (or all periods) with any sample in the
-- reporting window. Suppressed counts are NULL and named in suppressed_columns.
create or replace table audit_volume as
with pivoted as (
    select
        unit,
        unit_type,
        any_value(unit_label) as unit_label,
        period_start,
        max(case when family = 'samples' then value end) as samples,
        max(case when family = 'samples' and hidden then 1 else 0 end) = 1 as samples_hidden,
        max(case when family = 'patients' then value end) as patients,
        max(case when family = 'patients' and hidden then 1 else 0 end) = 1 as patients_hidden,
        max(case when family = 'samples_usable' then value end) as samples_usable,
        max(case when family = 'samples_usable' and hidden then 1 else 0 end) = 1 as samples_usable_hidden,
        max(case when family = 'samples_caution' then value end) as samples_caution,
        max(case when family = 'samples_caution' and hidden then 1 else 0 end) = 1 as samples_caution_hidden,
        max(case when family = 'samples_excluded' then value end) as samples_excluded,
        max(case when family = 'samples_excluded' and hidden then 1 else 0 end) = 1 as samples_excluded_hidden,
        max(case when family = 'excluded_sample_type' then value end) as excluded_sample_type,
        max(case when family = 'excluded_sample_type' and hidden then 1 else 0 end) = 1 as excluded_sample_type_hidden,
        max(case when family = 'excluded_data_quality' then value end) as excluded_data_quality,
        max(case when family = 'excluded_data_quality' and hidden then 1 else 0 end) = 1 as excluded_data_quality_hidden
    from audit_cell
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
    case when not v.patients_hidden then v.patients end as patients,
    case when not v.samples_usable_hidden then v.samples_usable end as samples_usable,
    case when not v.samples_caution_hidden then v.samples_caution end as samples_caution,
    case when not v.samples_excluded_hidden then v.samples_excluded end as samples_excluded,
    case when not v.excluded_sample_type_hidden then v.excluded_sample_type end as excluded_sample_type,
    case when not v.excluded_data_quality_hidden then v.excluded_data_quality end as excluded_data_quality,
    nullif(concat_ws(', ',
        case when v.samples_hidden then 'samples' end,
        case when v.patients_hidden then 'patients' end,
        case when v.samples_usable_hidden then 'samples_usable' end,
        case when v.samples_caution_hidden then 'samples_caution' end,
        case when v.samples_excluded_hidden then 'samples_excluded' end,
        case when v.excluded_sample_type_hidden then 'excluded_sample_type' end,
        case when v.excluded_data_quality_hidden then 'excluded_data_quality' end
    ), '') as suppressed_columns
from pivoted as v
join audit_period as p on p.period_start is not distinct from v.period_start
order by all_units, v.unit_type nulls last, unit, all_periods, v.period_start;
