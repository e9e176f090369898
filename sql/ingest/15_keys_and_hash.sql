-- Stage 1b: pseudonyms and the content hash of every row of stage_rows (12_stage_rows.sql),
-- as the temp view stage_converted that the later stages read.
-- A view, not a table: a copy of every column of a big file saved nothing (at 5 M rows
-- the copy took 11 s, and the insert into records from it 20 s, as long as the insert
-- through this view). DuckDB pushes a reader's join or semi join (the few repeated or
-- held rows) below the key joins, so such a reader pays the joins and the hash for its
-- own rows only; its scan of stage_units still reads the whole stage.
-- Input: stage_rows; stage_keys_patient, stage_keys_encounter, stage_keys_operator
-- (identifier -> pseudonym, each distinct identifier of the file once, made by
-- pipeline/pseudonym.py). Parameter: $keep_identifiers = the site keeps raw identifiers
-- ([store] keep_patient_id); when false they are NULL here, the hash included.
-- Grain: one row per data record.
set variable keep_identifiers = $keep_identifiers;

create or replace temp view stage_converted as
with keyed as (
    select
        u.* exclude (patient_id, encounter_id, operator_id),
        case when getvariable('keep_identifiers') then u.patient_id end as patient_id,
        p.pseudonym as patient_key,
        case when getvariable('keep_identifiers') then u.encounter_id end as encounter_id,
        e.pseudonym as encounter_key,
        case when getvariable('keep_identifiers') then u.operator_id end as operator_id,
        o.pseudonym as operator_key
    from stage_rows as u
    left join stage_keys_patient as p on p.identifier = u.patient_id
    left join stage_keys_encounter as e on e.identifier = u.encounter_id
    left join stage_keys_operator as o on o.identifier = u.operator_id
)
select
    *,
    -- Fields added later join the hash only when present, so a record without them keeps the
    -- hash it had before they existed and a re-delivery is still a duplicate, not a correction.
    -- Identifiers other than the patient's are hashed by pseudonym (the raw id may not be kept).
    case
        when encounter_key is null and target_spo2_low_pct is null and target_spo2_high_pct is null
             and o2_prescribed is null and collection_method is null and operator_key is null
        then hash(patient_id, unit, analyser_id, age_years, birth_date, collected_at, resulted_at,
                  sample_type, o2_device, o2_flow_l_min, fio2, barometric_pressure_mmhg, temperature_c,
                  ph, paco2_mmhg, pao2_mmhg, hco3_mmol_l, base_excess_mmol_l, sao2_pct,
                  sao2_is_calculated, spo2_pct, hb_g_dl, na_mmol_l, k_mmol_l, cl_mmol_l,
                  lactate_mmol_l, mean_airway_pressure_cmh2o, peep_cmh2o, hypercapnic_risk,
                  result_status, glucose_mmol_l, cohb_pct, methb_pct)
        else hash(patient_id, unit, analyser_id, age_years, birth_date, collected_at, resulted_at,
                  sample_type, o2_device, o2_flow_l_min, fio2, barometric_pressure_mmhg, temperature_c,
                  ph, paco2_mmhg, pao2_mmhg, hco3_mmol_l, base_excess_mmol_l, sao2_pct,
                  sao2_is_calculated, spo2_pct, hb_g_dl, na_mmol_l, k_mmol_l, cl_mmol_l,
                  lactate_mmol_l, mean_airway_pressure_cmh2o, peep_cmh2o, hypercapnic_risk,
                  result_status, glucose_mmol_l, cohb_pct, methb_pct,
                  encounter_key, target_spo2_low_pct, target_spo2_high_pct, o2_prescribed,
                  collection_method, operator_key)
    end as content_hash
from keyed;
