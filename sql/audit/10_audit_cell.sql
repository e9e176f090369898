-- Every count the audit publishes, before and after small-cell suppression. A family is a
-- set of samples (a count column of audit_unit_period_counts, or 'flag:<rule_id>', the samples
-- flagged by a data-quality or documentation rule), a set of episodes (the count columns of
-- audit_unit_period_episodes, each episode in the unit and period of its first sample) or
-- 'patients' (distinct patient_key, not additive: counted from audit_unit_period_patients).
-- Only periods of audit_window count.
-- Places: a unit; all units of one unit type (site_unit_types, from the site's [unit_types];
-- a unit not listed is 'unassigned'), so that units are compared with units like them; and
-- the whole site. The unit-type level is left out when every unit in the window has the same
-- type (it would repeat the site's counts).
-- Grain: one row per (family, place, period or all periods) with any sample in the reporting
-- window: unit NULL and unit_type T = all units of type T; both NULL = the whole site;
-- period_start NULL = all periods. unit_label names the place for people.
-- hidden starts as the primary rule: a count 1..$k-1 is small (is_small_cell, CMS cell size
-- suppression policy: no cell 1-10 shown or derivable), and a numerator whose denominator -
-- numerator is small (audit_pair) is hidden too; 12_audit_complementary_step.sql then adds
-- the complementary cells.
create or replace temp table audit_cell as
with typed_units as (
    select unit, any_value(unit_type) as unit_type from site_unit_types group by unit
),
windowed as (
    select c.*, coalesce(t.unit_type, 'unassigned') as unit_type, e.* exclude (unit, period_start)
    from audit_unit_period_counts as c
    semi join audit_window as w on w.period_start = c.period_start
    left join typed_units as t on t.unit = c.unit
    left join audit_unit_period_episodes as e on e.unit = c.unit and e.period_start = c.period_start
),
sums as (
    select
        case when grouping(unit) = 1 then null else unit end as unit,
        case when grouping(unit_type) = 1 then null else unit_type end as unit_type,
        case when grouping(period_start) = 1 then null else period_start end as period_start,
        sum(c.samples) as samples,
        sum(c.samples_usable) as samples_usable,
        sum(c.samples_caution) as samples_caution,
        sum(c.samples_excluded) as samples_excluded,
        sum(c.excluded_sample_type) as excluded_sample_type,
        sum(c.excluded_data_quality) as excluded_data_quality,
        sum(c.arterial) as arterial,
        sum(c.fio2_device_documented) as fio2_device_documented,
        sum(c.fio2_device_mismatch) as fio2_device_mismatch,
        sum(c.age_adult) as age_adult,
        sum(c.age_unknown) as age_unknown,
        sum(c.age_child) as age_child,
        sum(c.age_neonate) as age_neonate,
        sum(c.oxygen_assessed) as oxygen_assessed,
        sum(c.hypoxaemic) as hypoxaemic,
        sum(c.oxygen_unknown) as oxygen_unknown,
        sum(c.no_oxygen_documented) as no_oxygen_documented,
        sum(c.undocumented_oxygen) as undocumented_oxygen,
        sum(c.on_oxygen) as on_oxygen,
        sum(c.above_target_on_oxygen) as above_target_on_oxygen,
        sum(c.hyperoxaemic_on_oxygen) as hyperoxaemic_on_oxygen,
        sum(c.aa_assessed) as aa_assessed,
        sum(c.aa_above_limit) as aa_above_limit,
        sum(c.pf_assessed) as pf_assessed,
        sum(c.pf_severe) as pf_severe,
        sum(c.pf_moderate) as pf_moderate,
        sum(c.pf_mild) as pf_mild,
        sum(c.pf_above_300) as pf_above_300,
        sum(c.rx_known) as rx_known,
        sum(c.rx_active) as rx_active,
        sum(c.rx_not_prescribed) as rx_not_prescribed,
        sum(c.rx_with_target) as rx_with_target,
        sum(c.rx_target_assessed) as rx_target_assessed,
        sum(c.rx_within_target) as rx_within_target,
        sum(c.rx_above_target) as rx_above_target,
        sum(c.rx_below_target) as rx_below_target,
        sum(c.rx_risk_documented) as rx_risk_documented,
        sum(c.rx_target_conflicts_risk) as rx_target_conflicts_risk,
        coalesce(sum(c.episodes), 0) as episodes,
        coalesce(sum(c.episodes_first_hypoxaemic), 0) as episodes_first_hypoxaemic,
        coalesce(sum(c.episodes_any_hypoxaemic), 0) as episodes_any_hypoxaemic,
        coalesce(sum(c.episodes_on_oxygen), 0) as episodes_on_oxygen,
        coalesce(sum(c.episodes_any_above_target), 0) as episodes_any_above_target,
        coalesce(sum(c.episodes_any_out_of_target), 0) as episodes_any_out_of_target
    from windowed as c
    group by grouping sets (
        (unit_type, unit, period_start), (unit_type, unit), (unit_type, period_start), (unit_type), (period_start), ()
    )
),
-- Distinct patients per grouping, one simple aggregate each over the window's rows (a
-- (unit, period) row of audit_unit_period_patients is already one patient): 1.0 s against
-- 1.4 s for count(distinct) over grouping sets on a store of 5 M records.
windowed_patients as materialized (
    select p.unit, p.period_start, p.patient_key, coalesce(t.unit_type, 'unassigned') as unit_type
    from audit_unit_period_patients as p
    left join typed_units as t on t.unit = p.unit
    semi join audit_window as w on w.period_start = p.period_start
),
patient_counts as (
    select unit, unit_type, period_start, count(patient_key) as patients
    from windowed_patients
    group by unit, unit_type, period_start
    union all
    select unit, unit_type, null, count(distinct patient_key) from windowed_patients group by unit, unit_type
    union all
    select null, unit_type, period_start, count(distinct patient_key)
    from windowed_patients
    group by unit_type, period_start
    union all
    select null, unit_type, null, count(distinct patient_key) from windowed_patients group by unit_type
    union all
    select null, null, period_start, count(distinct patient_key) from windowed_patients group by period_start
    union all
    select null, null, null, count(distinct patient_key) from windowed_patients
),
-- the unit-type level only when the window holds more than one type
type_level as (
    select count(distinct unit_type) > 1 as shown from windowed
),
grouped as (
    select s.*, pc.patients
    from sums as s
    left join patient_counts as pc
        on pc.unit is not distinct from s.unit
       and pc.unit_type is not distinct from s.unit_type
       and pc.period_start is not distinct from s.period_start
    where s.unit is not null or s.unit_type is null or (select shown from type_level)
),
sample_cells as (
    select
        f.family,
        g.unit,
        g.unit_type,
        g.period_start,
        -- an empty window still has its all-units, all-periods row: zero, not NULL
        coalesce(case f.family
            when 'samples' then g.samples
            when 'patients' then g.patients
            when 'samples_usable' then g.samples_usable
            when 'samples_caution' then g.samples_caution
            when 'samples_excluded' then g.samples_excluded
            when 'excluded_sample_type' then g.excluded_sample_type
            when 'excluded_data_quality' then g.excluded_data_quality
            when 'arterial' then g.arterial
            when 'fio2_device_documented' then g.fio2_device_documented
            when 'fio2_device_mismatch' then g.fio2_device_mismatch
            when 'age_adult' then g.age_adult
            when 'age_unknown' then g.age_unknown
            when 'age_child' then g.age_child
            when 'age_neonate' then g.age_neonate
            when 'oxygen_assessed' then g.oxygen_assessed
            when 'hypoxaemic' then g.hypoxaemic
            when 'oxygen_unknown' then g.oxygen_unknown
            when 'no_oxygen_documented' then g.no_oxygen_documented
            when 'undocumented_oxygen' then g.undocumented_oxygen
            when 'on_oxygen' then g.on_oxygen
            when 'above_target_on_oxygen' then g.above_target_on_oxygen
            when 'hyperoxaemic_on_oxygen' then g.hyperoxaemic_on_oxygen
            when 'aa_assessed' then g.aa_assessed
            when 'aa_above_limit' then g.aa_above_limit
            when 'pf_assessed' then g.pf_assessed
            when 'pf_severe' then g.pf_severe
            when 'pf_moderate' then g.pf_moderate
            when 'pf_mild' then g.pf_mild
            when 'pf_above_300' then g.pf_above_300
            when 'rx_known' then g.rx_known
            when 'rx_active' then g.rx_active
            when 'rx_not_prescribed' then g.rx_not_prescribed
            when 'rx_with_target' then g.rx_with_target
            when 'rx_target_assessed' then g.rx_target_assessed
            when 'rx_within_target' then g.rx_within_target
            when 'rx_above_target' then g.rx_above_target
            when 'rx_below_target' then g.rx_below_target
            when 'rx_risk_documented' then g.rx_risk_documented
            when 'rx_target_conflicts_risk' then g.rx_target_conflicts_risk
            when 'episodes' then g.episodes
            when 'episodes_first_hypoxaemic' then g.episodes_first_hypoxaemic
            when 'episodes_any_hypoxaemic' then g.episodes_any_hypoxaemic
            when 'episodes_on_oxygen' then g.episodes_on_oxygen
            when 'episodes_any_above_target' then g.episodes_any_above_target
            when 'episodes_any_out_of_target' then g.episodes_any_out_of_target
        end, 0) as value
    from grouped as g
    cross join (
        values
        ('samples'),
        ('patients'),
        ('samples_usable'),
        ('samples_caution'),
        ('samples_excluded'),
        ('excluded_sample_type'),
        ('excluded_data_quality'),
        ('arterial'),
        ('fio2_device_documented'),
        ('fio2_device_mismatch'),
        ('age_adult'),
        ('age_unknown'),
        ('age_child'),
        ('age_neonate'),
        ('oxygen_assessed'),
        ('hypoxaemic'),
        ('oxygen_unknown'),
        ('no_oxygen_documented'),
        ('undocumented_oxygen'),
        ('on_oxygen'),
        ('above_target_on_oxygen'),
        ('hyperoxaemic_on_oxygen'),
        ('aa_assessed'),
        ('aa_above_limit'),
        ('pf_assessed'),
        ('pf_severe'),
        ('pf_moderate'),
        ('pf_mild'),
        ('pf_above_300'),
        ('rx_known'),
        ('rx_active'),
        ('rx_not_prescribed'),
        ('rx_with_target'),
        ('rx_target_assessed'),
        ('rx_within_target'),
        ('rx_above_target'),
        ('rx_below_target'),
        ('rx_risk_documented'),
        ('rx_target_conflicts_risk'),
        ('episodes'),
        ('episodes_first_hypoxaemic'),
        ('episodes_any_hypoxaemic'),
        ('episodes_on_oxygen'),
        ('episodes_any_above_target'),
        ('episodes_any_out_of_target')
    ) as f(family)
),
flag_counts as (
    select
        f.rule_id,
        case when grouping(f.unit) = 1 then null else f.unit end as unit,
        case when grouping(unit_type) = 1 then null else unit_type end as unit_type,
        case when grouping(f.period_start) = 1 then null else f.period_start end as period_start,
        sum(f.flagged) as value
    from (
        select f.*, coalesce(t.unit_type, 'unassigned') as unit_type
        from audit_unit_period_flags as f
        left join typed_units as t on t.unit = f.unit
    ) as f
    semi join audit_window as w on w.period_start = f.period_start
    group by f.rule_id, grouping sets (
        (unit_type, f.unit, f.period_start), (unit_type, f.unit), (unit_type, f.period_start), (unit_type),
        (f.period_start), ()
    )
),
flag_cells as (
    select
        'flag:' || c.rule_id as family,
        g.unit,
        g.unit_type,
        g.period_start,
        coalesce(fc.value, 0) as value
    from grouped as g
    cross join (select rule_id from rule_catalogue where kind in ('data_quality', 'documentation')) as c
    left join flag_counts as fc
        on fc.rule_id = c.rule_id
       and fc.unit is not distinct from g.unit
       and fc.unit_type is not distinct from g.unit_type
       and fc.period_start is not distinct from g.period_start
),
-- Adult age bands: '<family>@<band>' for the families of audit_unit_period_age_bands, so that
-- audit_age_band_rates can compare like with like; the bands of a family add up to it
-- (06_audit_partition.sql).
band_counts as (
    select
        b.family || '@' || b.age_band as family,
        case when grouping(b.unit) = 1 then null else b.unit end as unit,
        case when grouping(unit_type) = 1 then null else unit_type end as unit_type,
        case when grouping(b.period_start) = 1 then null else b.period_start end as period_start,
        sum(b.value) as value
    from (
        select a.unit, a.period_start, a.age_band, coalesce(t.unit_type, 'unassigned') as unit_type, v.family, v.value
        from audit_unit_period_age_bands as a
        left join typed_units as t on t.unit = a.unit
        cross join lateral (
            values
                ('oxygen_assessed', a.oxygen_assessed),
                ('hypoxaemic', a.hypoxaemic),
                ('on_oxygen', a.on_oxygen),
                ('above_target_on_oxygen', a.above_target_on_oxygen),
                ('rx_target_assessed', a.rx_target_assessed),
                ('rx_within_target', a.rx_within_target)
        ) as v(family, value)
    ) as b
    semi join audit_window as w on w.period_start = b.period_start
    group by b.family, b.age_band, grouping sets (
        (unit_type, b.unit, b.period_start), (unit_type, b.unit), (unit_type, b.period_start), (unit_type),
        (b.period_start), ()
    )
),
band_cells as (
    select
        f.family,
        g.unit,
        g.unit_type,
        g.period_start,
        coalesce(bc.value, 0) as value
    from grouped as g
    cross join (select family from audit_age_band_family) as f
    left join band_counts as bc
        on bc.family = f.family
       and bc.unit is not distinct from g.unit
       and bc.unit_type is not distinct from g.unit_type
       and bc.period_start is not distinct from g.period_start
),
counted as (
    select family, unit, unit_type, period_start, value from sample_cells
    union all
    select family, unit, unit_type, period_start, value from flag_cells
    union all
    select family, unit, unit_type, period_start, value from band_cells
),
remainders as (
    -- numerators whose remainder (denominator - numerator) is small
    select
        x.family,
        x.unit,
        x.unit_type,
        x.period_start,
        max(case when is_small_cell(n.value - x.value, $k) then 1 else 0 end) = 1 as small_remainder
    from audit_pair as p
    join counted as x on x.family = p.numerator_family
    join counted as n
        on n.family = p.denominator_family
       and n.unit is not distinct from x.unit
       and n.unit_type is not distinct from x.unit_type
       and n.period_start is not distinct from x.period_start
    group by x.family, x.unit, x.unit_type, x.period_start
)
select
    row_number() over (
        order by c.family, c.unit_type nulls last, c.unit nulls last, c.period_start nulls last
    ) as cell_id,
    c.family,
    c.unit,
    c.unit_type,
    case
        when c.unit is not null then c.unit
        when c.unit_type is not null then 'All ' || replace(c.unit_type, '_', ' ') || ' units'
        else 'All units'
    end as unit_label,
    c.period_start,
    cast(c.value as bigint) as value,
    c.family <> 'patients' as additive,
    coalesce(is_small_cell(c.value, $k), false) or coalesce(r.small_remainder, false) as hidden,
    case
        when is_small_cell(c.value, $k) then 'small count'
        when r.small_remainder then 'small remainder'
    end as hidden_reason
from counted as c
left join remainders as r
    on r.family = c.family
   and r.unit is not distinct from c.unit
   and r.unit_type is not distinct from c.unit_type
   and r.period_start is not distinct from c.period_start;
