-- Stage 1b of a prescriptions file (see 15_keys_and_hash.sql): pseudonyms and the content
-- hash of every row of stage_units, into stage_converted.
-- Input: stage_units, stage_keys_patient, stage_keys_encounter. Parameter: $keep_identifiers.
-- Grain: one row per data record.
create or replace temp table stage_converted as
with keyed as (
    select
        -- rows DuckDB read are numbered by their place in stage_units (file order)
        coalesce(u.source_row, u.rowid + 1) as source_row,
        u.* exclude (source_row, __usual, __cells, __nonblank, patient_id, encounter_id),
        case when $keep_identifiers then u.patient_id end as patient_id,
        p.pseudonym as patient_key,
        case when $keep_identifiers then u.encounter_id end as encounter_id,
        e.pseudonym as encounter_key
    from stage_units as u
    left join stage_keys_patient as p on p.identifier = u.patient_id
    left join stage_keys_encounter as e on e.identifier = u.encounter_id
    where u.__usual is distinct from false  -- rows with an unusual cell: their Python-parsed copy counts
)
select
    *,
    -- The patient and encounter by pseudonym: the raw identifiers may not be kept.
    hash(patient_key, encounter_key, unit, start_at, end_at, target_spo2_low_pct, target_spo2_high_pct,
         o2_device, o2_flow_l_min, fio2, prescriber_role) as content_hash
from keyed;
