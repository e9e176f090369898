-- Audit input: the records of the reporting window with their audit status, derived
-- oxygen metrics and the count families each belongs to (one boolean per family).
-- Grain: one row per record with a collection time in the reporting window: the latest
-- $history_periods periods that hold data, where a period is a calendar $period ('month' or
-- ISO 'week', Monday first) of the collection time in UTC. With $complete_periods_only the
-- period still under way (the latest collection time falls before its last day) is left
-- out until it ends: its small, growing counts would otherwise be suppressed and force
-- complementary suppression into the complete periods.
-- Denominators (stated in the report):
--   documentation measures use every sample labelled arterial or of unknown type, whatever
--     its data-quality flags (a flag such as fio2_outside_device_range is what they count);
--   oxygenation measures use only samples whose audit status is usable or caution
--     (audit_status.audit_status), and report the excluded ones separately.
create or replace temp table audit_sample as
with placed as (
    select
        r.sample_id,
        r.patient_key,
        coalesce(r.unit, '(unit not recorded)') as unit,
        r.collected_at,
        cast(date_trunc($period, r.collected_at) as date) as period_start,
        a.audit_status,
        coalesce(r.sample_type, 'unknown') in ('arterial', 'unknown') as arterial,
        r.fio2 is not null as fio2_typed,
        d.fio2_used,
        r.o2_device,
        d.oxygen_status,
        coalesce(d.on_supplemental_oxygen, false) as on_supplemental_oxygen,
        d.arterial_saturation_pct,
        d.target_high_pct,
        d.aa_gradient_excess_mmhg,
        d.pf_band
    from records as r
    join audit_status as a on a.sample_id = r.sample_id
    left join derived as d on d.sample_id = r.sample_id
    where r.collected_at is not null
),
periods as (
    select
        period_start,
        case
            when $period = 'week' then cast(period_start + interval '6 days' as date)
            else cast(period_start + interval '1 month' - interval '1 day' as date)
        end as last_day
    from placed
    group by period_start
),
reportable as (
    select p.period_start
    from periods as p
    cross join (select cast(max(collected_at) as date) as latest_day from placed) as l
    where not $complete_periods_only or l.latest_day >= p.last_day
),
windowed as (
    select
        placed.*,
        dense_rank() over (order by placed.period_start desc) as periods_back
    from placed
    join reportable as rp on rp.period_start = placed.period_start
),
status as (
    select
        *,
        audit_status in ('usable', 'caution') as included,
        audit_status in ('usable', 'caution') and oxygen_status is not null as oxygen_assessed,
        -- FiO2 typed, or implied (0.21) by a documented room-air device; device known
        arterial and fio2_used is not null and o2_device is not null and o2_device <> 'unknown'
            as fio2_device_documented
    from windowed
    where periods_back <= $history_periods
)
select
    s.sample_id,
    s.patient_key,
    s.unit,
    s.period_start,
    s.audit_status,
    s.arterial,
    s.audit_status = 'usable' as samples_usable,
    s.audit_status = 'caution' as samples_caution,
    s.audit_status = 'excluded' as samples_excluded,
    s.audit_status = 'excluded' and not s.arterial as excluded_sample_type,
    s.audit_status = 'excluded' and s.arterial as excluded_data_quality,
    s.included,
    s.fio2_device_documented,
    s.fio2_device_documented and exists (
        select 1 from flags as f where f.sample_id = s.sample_id and f.rule_id = 'fio2_outside_device_range'
    ) as fio2_device_mismatch,
    s.oxygen_assessed,
    s.oxygen_assessed and s.oxygen_status = 'hypoxaemic' as hypoxaemic,
    s.oxygen_assessed and s.on_supplemental_oxygen as on_oxygen,
    -- saturation above the applicable target range, whether or not PaO2 also counts as hyperoxaemic
    s.oxygen_assessed and s.on_supplemental_oxygen and s.arterial_saturation_pct > s.target_high_pct
        as above_target_on_oxygen,
    s.oxygen_assessed and s.on_supplemental_oxygen and s.oxygen_status = 'hyperoxaemic' as hyperoxaemic_on_oxygen,
    s.oxygen_assessed and s.aa_gradient_excess_mmhg is not null as aa_assessed,
    s.oxygen_assessed and s.aa_gradient_excess_mmhg > 0 as aa_above_limit,
    s.oxygen_assessed and s.pf_band is not null as pf_assessed,
    s.oxygen_assessed and s.pf_band = 'severe' as pf_severe,
    s.oxygen_assessed and s.pf_band = 'moderate' as pf_moderate,
    s.oxygen_assessed and s.pf_band = 'mild' as pf_mild,
    s.oxygen_assessed and s.pf_band = 'none' as pf_above_300
from status as s;
