-- Every count the audit publishes, before and after small-cell suppression. A family is a
-- set of samples (a count column of audit_unit_period_counts, or 'flag:<rule_id>', the samples
-- flagged by a data-quality or documentation rule) or 'patients' (distinct patient_key, not
-- additive: counted from audit_unit_period_patients). Only periods of audit_window count.
-- Grain: one row per (family, unit or all units, period or all periods) with any sample in the
-- reporting window; unit NULL = all units, period_start NULL = all periods.
-- hidden starts as the primary rule: a count 1..$k-1 is small (is_small_cell, CMS cell size
-- suppression policy: no cell 1-10 shown or derivable), and a numerator whose denominator -
-- numerator is small (audit_pair) is hidden too; 12_audit_complementary_step.sql then adds
-- the complementary cells.
create or replace temp table audit_cell as
with windowed as (
    select c.*
    from audit_unit_period_counts as c
    semi join audit_window as w on w.period_start = c.period_start
),
sums as (
    select
        case when grouping(unit) = 1 then null else unit end as unit,
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
        sum(c.pf_above_300) as pf_above_300
    from windowed as c
    group by grouping sets ((unit, period_start), (unit), (period_start), ())
),
patient_counts as (
    select
        case when grouping(unit) = 1 then null else unit end as unit,
        case when grouping(period_start) = 1 then null else period_start end as period_start,
        count(distinct patient_key) as patients
    from audit_unit_period_patients as p
    semi join audit_window as w on w.period_start = p.period_start
    group by grouping sets ((unit, period_start), (unit), (period_start), ())
),
grouped as (
    select s.*, pc.patients
    from sums as s
    left join patient_counts as pc
        on pc.unit is not distinct from s.unit
       and pc.period_start is not distinct from s.period_start
),
sample_cells as (
    select
        f.family,
        g.unit,
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
        ('pf_above_300')
    ) as f(family)
),
flag_counts as (
    select
        f.rule_id,
        case when grouping(f.unit) = 1 then null else f.unit end as unit,
        case when grouping(f.period_start) = 1 then null else f.period_start end as period_start,
        sum(f.flagged) as value
    from audit_unit_period_flags as f
    semi join audit_window as w on w.period_start = f.period_start
    group by f.rule_id, grouping sets ((f.unit, f.period_start), (f.unit), (f.period_start), ())
),
flag_cells as (
    select
        'flag:' || c.rule_id as family,
        g.unit,
        g.period_start,
        coalesce(fc.value, 0) as value
    from grouped as g
    cross join (select rule_id from rule_catalogue where kind in ('data_quality', 'documentation')) as c
    left join flag_counts as fc
        on fc.rule_id = c.rule_id
       and fc.unit is not distinct from g.unit
       and fc.period_start is not distinct from g.period_start
),
counted as (
    select family, unit, period_start, value from sample_cells
    union all
    select family, unit, period_start, value from flag_cells
),
remainders as (
    -- numerators whose remainder (denominator - numerator) is small
    select
        x.family,
        x.unit,
        x.period_start,
        max(case when is_small_cell(n.value - x.value, $k) then 1 else 0 end) = 1 as small_remainder
    from audit_pair as p
    join counted as x on x.family = p.numerator_family
    join counted as n
        on n.family = p.denominator_family
       and n.unit is not distinct from x.unit
       and n.period_start is not distinct from x.period_start
    group by x.family, x.unit, x.period_start
)
select
    row_number() over (order by c.family, c.unit nulls last, c.period_start nulls last) as cell_id,
    c.family,
    c.unit,
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
   and r.period_start is not distinct from c.period_start;
