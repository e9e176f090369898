-- Stage 1b of a prescriptions file (see 15_keys_and_hash.sql): pseudonyms and the content
-- hash of every row of stage_rows, as the temp view stage_converted.
-- Input: stage_rows, stage_keys_patient, stage_keys_encounter. Parameter: $keep_identifiers.
-- Grain: one row per data record.
set variable keep_identifiers = $keep_identifiers;

create or replace temp view stage_converted as
with keyed as (
    select
        u.* exclude (patient_id, encounter_id),
        case when getvariable('keep_identifiers') then u.patient_id end as patient_id,
        p.pseudonym as patient_key,
        case when getvariable('keep_identifiers') then u.encounter_id end as encounter_id,
        e.pseudonym as encounter_key
    from stage_rows as u
    left join stage_keys_patient as p on p.identifier = u.patient_id
    left join stage_keys_encounter as e on e.identifier = u.encounter_id
)
select
    *,
    -- The patient and encounter by pseudonym: the raw identifiers may not be kept.
    hash(patient_key, encounter_key, unit, start_at, end_at, target_spo2_low_pct, target_spo2_high_pct,
         o2_device, o2_flow_l_min, fio2, prescriber_role) as content_hash
from keyed;
