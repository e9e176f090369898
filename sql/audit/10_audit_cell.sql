-- Every count the audit publishes, before and after small-cell suppression. A family is a
-- set of samples (a boolean column of audit_sample, or 'flag:<rule_id>', the samples flagged
-- by a data-quality or documentation rule) or 'patients' (distinct patient_key, not additive).
-- Grain: one row per (family, unit or all units, period or all periods) with any sample in the
-- reporting window; unit NULL = all units, period_start NULL = all periods.
-- hidden starts as the primary rule: a count 1..$k-1 is small (is_small_cell, CMS cell size
-- suppression policy: no cell 1-10 shown or derivable), and a numerator whose denominator -
-- numerator is small (audit_pair) is hidden too; 12_audit_complementary_step.sql then adds
-- the complementary cells.
create or replace temp table audit_cell as
with grouped as (
    select
        case when grouping(unit) = 1 then null else unit end as unit,
        case when grouping(period_start) = 1 then null else period_start end as period_start,
        count(*) as samples,
        count(distinct patient_key) as patients,
        sum(case when samples_usable then 1 else 0 end) as samples_usable,
        sum(case when samples_caution then 1 else 0 end) as samples_caution,
        sum(case when samples_excluded then 1 else 0 end) as samples_excluded,
        sum(case when excluded_sample_type then 1 else 0 end) as excluded_sample_type,
        sum(case when excluded_data_quality then 1 else 0 end) as excluded_data_quality,
        sum(case when arterial then 1 else 0 end) as arterial,
        sum(case when fio2_device_documented then 1 else 0 end) as fio2_device_documented,
        sum(case when fio2_device_mismatch then 1 else 0 end) as fio2_device_mismatch,
        sum(case when oxygen_assessed then 1 else 0 end) as oxygen_assessed,
        sum(case when hypoxaemic then 1 else 0 end) as hypoxaemic,
        sum(case when on_oxygen then 1 else 0 end) as on_oxygen,
        sum(case when above_target_on_oxygen then 1 else 0 end) as above_target_on_oxygen,
        sum(case when hyperoxaemic_on_oxygen then 1 else 0 end) as hyperoxaemic_on_oxygen,
        sum(case when aa_assessed then 1 else 0 end) as aa_assessed,
        sum(case when aa_above_limit then 1 else 0 end) as aa_above_limit,
        sum(case when pf_assessed then 1 else 0 end) as pf_assessed,
        sum(case when pf_severe then 1 else 0 end) as pf_severe,
        sum(case when pf_moderate then 1 else 0 end) as pf_moderate,
        sum(case when pf_mild then 1 else 0 end) as pf_mild,
        sum(case when pf_above_300 then 1 else 0 end) as pf_above_300
    from audit_sample
    group by grouping sets ((unit, period_start), (unit), (period_start), ())
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
            when 'oxygen_assessed' then g.oxygen_assessed
            when 'hypoxaemic' then g.hypoxaemic
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
        ('oxygen_assessed'),
        ('hypoxaemic'),
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
        case when grouping(s.unit) = 1 then null else s.unit end as unit,
        case when grouping(s.period_start) = 1 then null else s.period_start end as period_start,
        count(distinct f.sample_id) as value
    from flags as f
    join audit_sample as s on s.sample_id = f.sample_id
    where f.kind in ('data_quality', 'documentation')
    group by f.rule_id, grouping sets ((s.unit, s.period_start), (s.unit), (s.period_start), ())
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
