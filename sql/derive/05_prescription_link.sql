-- Each sample in scope linked to the oxygen prescription active at its collection time.
-- Linking rule:
--   candidates  prescriptions of the same patient (patient_key) that started at or before the
--               collection time and had not ended (end_at NULL = open-ended; a prescription
--               ending at the collection time is over); when both the sample and the
--               prescription carry an encounter, it must be the same encounter;
--   overlaps    the prescription that started latest wins (a new prescription replaces the
--               one before it even when the old one was never closed); ties: the higher
--               version, then the higher prescription_id (deterministic);
--   no link     the sample's own charting (target range or o2_prescribed on the export) when
--               present; else 'not_prescribed' when the site's prescriptions feed covers the
--               collection time (on or after the earliest prescription start held) and the
--               sample has a patient; else 'prescription_unknown'.
-- A target range counts only with both ends and low < high (a sample's charted range is
-- loaded as charted, so a reversed one is treated here as absent). The position of the arterial saturation against
-- it is decided in 10_derived.sql.
-- Grain: one row per sample of scope_samples.
create or replace temp table prescription_link as
with samples as (
    select
        r.sample_id,
        r.patient_key,
        r.encounter_key,
        r.collected_at,
        r.o2_prescribed,
        case when r.target_spo2_low_pct < r.target_spo2_high_pct then r.target_spo2_low_pct end as target_spo2_low_pct,
        case when r.target_spo2_low_pct < r.target_spo2_high_pct then r.target_spo2_high_pct end as target_spo2_high_pct
    from records as r
    join scope_samples as s using (sample_id)
),
feed as (
    select min(start_at) as covered_from from prescriptions
),
candidates as (
    select
        s.sample_id,
        p.prescription_id,
        p.target_spo2_low_pct,
        p.target_spo2_high_pct,
        row_number() over (
            partition by s.sample_id
            order by p.start_at desc, p.version desc, p.prescription_id desc
        ) as pick
    from samples as s
    join prescriptions as p
        on p.patient_key = s.patient_key
       and p.start_at <= s.collected_at
       and (p.end_at is null or s.collected_at < p.end_at)
       and (s.encounter_key is null or p.encounter_key is null or p.encounter_key = s.encounter_key)
),
linked as (
    select * from candidates where pick = 1
)
select
    s.sample_id,
    l.prescription_id,
    case
        when l.prescription_id is not null then 'feed'
        when s.o2_prescribed is not null
             or (s.target_spo2_low_pct is not null and s.target_spo2_high_pct is not null) then 'sample'
    end as prescription_source,
    case
        when l.prescription_id is not null then
            case when l.target_spo2_low_pct is not null and l.target_spo2_high_pct is not null
                 then 'prescribed' else 'prescribed_without_target' end
        when s.target_spo2_low_pct is not null and s.target_spo2_high_pct is not null then 'prescribed'
        when s.o2_prescribed then 'prescribed_without_target'
        when not s.o2_prescribed then 'not_prescribed'
        when s.patient_key is not null and s.collected_at >= f.covered_from then 'not_prescribed'
        else 'prescription_unknown'
    end as prescription_status,
    case
        when l.prescription_id is not null then
            case when l.target_spo2_high_pct is not null then l.target_spo2_low_pct end
        when s.target_spo2_high_pct is not null then s.target_spo2_low_pct
    end as prescribed_target_low_pct,
    case
        when l.prescription_id is not null then
            case when l.target_spo2_low_pct is not null then l.target_spo2_high_pct end
        when s.target_spo2_low_pct is not null then s.target_spo2_high_pct
    end as prescribed_target_high_pct
from samples as s
cross join feed as f
left join linked as l using (sample_id);
