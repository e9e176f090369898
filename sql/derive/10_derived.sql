-- Derived physiology per sample: the `derived` table of the public contract.
-- Grain: one row per sample in scope_samples (a temp table of sample_ids: the whole store
-- on a rebuild, the samples new or corrected in this run otherwise).
-- Every formula is a macro from sql/macros/ (one home per formula). A metric that is not
-- defined for a record is NULL and the reason is in metrics_null_reason.
-- Parameters (defaults and sources in pipeline/catalogue.toml, [derive]):
--   $site_pb_mmhg, $site_altitude_m   barometric pressure when the record has none
--   $rq                                respiratory exchange ratio for the alveolar gas equation
--   $aa_method                         age-expected A-a limit formula
--   $room_air_fio2_max                 highest FiO2 still counted as room air
--   $target_low, $target_high          usual saturation target (percent)
--   $hypercapnic_target_low, $hypercapnic_target_high, $hypercapnic_paco2_mmhg
--   $hypoxaemia_pao2_mmhg, $hypoxaemia_sat_pct, $hyperoxaemia_pao2_mmhg
--   $adult_age_years, $neonate_days            age groups (targets, A-a limit and curve are adult)
--   $gas_temperature_min_c, $gas_temperature_max_c   band in which 37 C gases are corrected to the
--                                      patient's temperature for the alveolar comparison
--   $alveolar_tolerance_mmhg, $alveolar_tolerance_fraction   tolerance above the R = 1 alveolar bound
--   $dyshaemoglobin_max_pct           COHb + MetHb above which a saturation is not read on the curve
-- Temp table unit_oxygen_targets (unit, unit_type, target_low_pct, target_high_pct, assessed): a
-- site's target range per unit type (pipeline/derive.py fills it from the site configuration).
-- Temp table prescription_link (05_prescription_link.sql): the prescription active at collection.
-- Episodes: an encounter (encounter_key), else the patient's calendar day of collection (UTC),
-- else the sample alone (no patient identifier).
create or replace temp table derived_batch as
with base as (
    select
        r.sample_id,
        r.sample_type,
        r.age_years,
        r.fio2,
        r.o2_device,
        r.pao2_mmhg,
        r.paco2_mmhg,
        r.ph,
        r.hco3_mmol_l,
        r.base_excess_mmol_l,
        r.temperature_c,
        r.sao2_pct,
        r.sao2_is_calculated,
        r.spo2_pct,
        r.peep_cmh2o,
        r.mean_airway_pressure_cmh2o,
        r.na_mmol_l,
        r.cl_mmol_l,
        r.k_mmol_l,
        r.hypercapnic_risk,
        r.cohb_pct,
        r.methb_pct,
        r.o2_flow_l_min,
        r.encounter_key,
        case
            when r.encounter_key is not null then 'encounter:' || r.encounter_key
            when r.patient_key is not null and r.collected_at is not null
                then 'patient_day:' || r.patient_key || '/' || cast(cast(r.collected_at as date) as varchar)
            else 'sample:' || r.sample_id
        end as episode_key,
        case
            when r.encounter_key is not null then 'encounter'
            when r.patient_key is not null and r.collected_at is not null then 'patient_day'
            else 'sample'
        end as episode_basis,
        x.prescription_id,
        x.prescription_source,
        x.prescription_status,
        x.prescribed_target_low_pct,
        x.prescribed_target_high_pct,
        coalesce(r.sample_type, 'unknown') in ('arterial', 'unknown') as is_arterial_or_unknown,
        -- Age: the exported age, else from the birth date at collection (365.25-day years).
        coalesce(r.age_years, date_diff('day', r.birth_date, cast(r.collected_at as date)) / 365.25)
            as age_years_used,
        case when r.age_years is not null then 'exported'
             when r.birth_date is not null and r.collected_at is not null then 'birth_date' end as age_source,
        u.unit_type,
        u.target_low_pct as unit_target_low_pct,
        u.target_high_pct as unit_target_high_pct,
        coalesce(u.assessed, true) as unit_assessed,
        -- Gases are reported at 37 C; within the band they are compared at the patient's temperature.
        case when coalesce(r.temperature_c, 37.0) between $gas_temperature_min_c and $gas_temperature_max_c
             then coalesce(r.temperature_c, 37.0) end as gas_temperature_c,
        -- The highest FiO2 the documented device can deliver (low-flow devices), else the documented FiO2.
        case when r.o2_device in ('nasal_cannula', 'simple_mask', 'reservoir_mask')
             then greatest(coalesce(r.fio2, 0.0), device_fio2_max(r.o2_device, r.o2_flow_l_min))
             when r.fio2 is not null then r.fio2
             when r.o2_device = 'room_air' then 0.21 end as fio2_upper_bound,
        effective_barometric_pressure_mmhg(r.barometric_pressure_mmhg, $site_pb_mmhg, $site_altitude_m)
            as pb_mmhg,
        -- Room air documented by device but no FiO2 typed: room air is 0.21 by definition.
        case
            when r.fio2 is not null then r.fio2
            when r.o2_device = 'room_air' then 0.21
        end as fio2_used,
        case
            when r.fio2 is not null then 'documented'
            when r.o2_device = 'room_air' then 'room_air_device'
        end as fio2_source,
        epoch(r.resulted_at - r.collected_at) / 60.0 as turnaround_min
    from records as r
    join scope_samples as s using (sample_id)
    left join unit_oxygen_targets as u on u.unit = r.unit
    left join prescription_link as x on x.sample_id = r.sample_id
),
aged as (
    select
        *,
        case when age_years_used is null then 'unknown'
             when age_years_used < $neonate_days / 365.25 then 'neonate'
             when age_years_used < $adult_age_years then 'child'
             else 'adult' end as age_group,
        -- PaO2 and PaCO2 at the patient's temperature, and the R = 1 alveolar bound there
        po2_at_temperature_mmhg(pao2_mmhg, gas_temperature_c) as pao2_patient_temp_mmhg,
        pco2_at_temperature_mmhg(paco2_mmhg, gas_temperature_c) as paco2_patient_temp_mmhg,
        water_vapour_pressure_mmhg(gas_temperature_c) as ph2o_patient_temp_mmhg
    from base
),
bounded as (
    select
        *,
        alveolar_po2_max_mmhg(fio2_upper_bound, paco2_patient_temp_mmhg, pb_mmhg := pb_mmhg,
                              ph2o_mmhg := ph2o_patient_temp_mmhg) as pao2_limit_patient_temp_mmhg,
        alveolar_po2_max_mmhg(0.21, paco2_patient_temp_mmhg, pb_mmhg := pb_mmhg,
                              ph2o_mmhg := ph2o_patient_temp_mmhg) as pao2_room_air_limit_patient_temp_mmhg,
        alveolar_po2_full_mmhg(fio2_used, paco2_patient_temp_mmhg, pb_mmhg := pb_mmhg,
                               ph2o_mmhg := ph2o_patient_temp_mmhg, rq := $rq) as pao2_alveolar_full_patient_temp_mmhg,
        -- no FiO2 and no device (other than unknown) documented
        fio2 is null and (o2_device is null or o2_device = 'unknown') as oxygen_undocumented
    from aged
),
gas as (
    select
        *,
        inspired_po2_mmhg(fio2_used, pb_mmhg) as inspired_po2_mmhg,
        alveolar_po2_simplified_mmhg(fio2_used, paco2_mmhg, pb_mmhg := pb_mmhg, rq := $rq) as pao2_alveolar_mmhg,
        alveolar_po2_full_mmhg(fio2_used, paco2_mmhg, pb_mmhg := pb_mmhg, rq := $rq) as pao2_alveolar_full_mmhg,
        alveolar_po2_max_mmhg(fio2_used, paco2_mmhg, pb_mmhg := pb_mmhg) as pao2_alveolar_max_mmhg,
        fio2_used is not null and fio2_used <= $room_air_fio2_max as on_room_air,
        -- PaO2 and pH are the analyser's 37 C values, and a sealed sample keeps its saturation when
        -- warmed to 37 C, so the curve is read at 37 C whatever the patient's temperature.
        predicted_sao2_pct(pao2_mmhg, ph := coalesce(ph, 7.40), temp_c := 37.0,
                           base_excess := coalesce(base_excess_mmol_l, 0.0)) as predicted_sao2_pct,
        -- PaO2 above the R = 1 bound (plus tolerance) at the patient's temperature
        pao2_patient_temp_mmhg - pao2_limit_patient_temp_mmhg
            - greatest($alveolar_tolerance_mmhg, $alveolar_tolerance_fraction * pao2_limit_patient_temp_mmhg)
            as pao2_excess_over_limit_mmhg,
        pao2_patient_temp_mmhg > pao2_room_air_limit_patient_temp_mmhg
            + greatest($alveolar_tolerance_mmhg, $alveolar_tolerance_fraction * pao2_room_air_limit_patient_temp_mmhg)
            as pao2_beyond_room_air
    from bounded
),
metrics as (
    select
        *,
        aa_gradient_mmhg(pao2_alveolar_mmhg, pao2_mmhg) as aa_gradient_mmhg,
        -- the age-expected limit is an adult room-air formula
        case when on_room_air and age_group = 'adult' then aa_gradient_expected_mmhg(age_years_used, method := $aa_method) end
            as aa_gradient_expected_mmhg,
        arterial_alveolar_ratio(pao2_mmhg, pao2_alveolar_mmhg) as a_over_a_ratio,
        pf_ratio(pao2_mmhg, fio2_used) as pf_ratio,
        -- Berlin: P/F adjusted by PB/760 above 1000 m; the band needs PEEP or CPAP >= 5 cmH2O.
        berlin_band(case when pb_mmhg < barometric_pressure_from_altitude_mmhg(1000.0)
                         then pf_ratio_altitude_adjusted(pf_ratio(pao2_mmhg, fio2_used), pb_mmhg)
                         else pf_ratio(pao2_mmhg, fio2_used) end) as pf_band,
        berlin_peep_met(peep_cmh2o) as pf_band_peep_met,
        -- S/F tracks P/F only while the saturation is on the steep part of the curve (SpO2 <= 97 %).
        case when spo2_pct <= 97 then sf_ratio(spo2_pct, fio2_used) end as sf_ratio,
        oxygenation_index(fio2_used, mean_airway_pressure_cmh2o, pao2_mmhg) as oxygenation_index,
        case when sao2_pct is not null and not coalesce(sao2_is_calculated, false)
             then functional_saturation_pct(sao2_pct, cohb_pct, methb_pct) - predicted_sao2_pct end
            as sao2_residual_pct,
        case when sao2_pct is not null and not coalesce(sao2_is_calculated, false)
             then functional_saturation_pct(sao2_pct, cohb_pct, methb_pct) end as sao2_functional_pct,
        -- the measured saturation that may be read against the standard curve: not when carboxy- or
        -- methaemoglobin is raised (they shift the curve)
        case when sao2_pct is not null and not coalesce(sao2_is_calculated, false)
                  and coalesce(cohb_pct, 0.0) + coalesce(methb_pct, 0.0) <= $dyshaemoglobin_max_pct
             then functional_saturation_pct(sao2_pct, cohb_pct, methb_pct) end as sao2_curve_pct,
        henderson_hasselbalch_ph(paco2_mmhg, hco3_mmol_l) as ph_predicted,
        acid_base_residual(ph, paco2_mmhg, hco3_mmol_l) as acid_base_residual,
        winters_expected_paco2_mmhg(hco3_mmol_l) as winters_expected_paco2_mmhg,
        anion_gap(na_mmol_l, cl_mmol_l, hco3_mmol_l) as anion_gap_mmol_l,
        fio2_used > $room_air_fio2_max
            or (fio2_used is null and o2_device is not null and o2_device not in ('room_air', 'unknown'))
            as on_supplemental_oxygen,
        -- The saturation of this arterial sample: measured by co-oximetry (functional), else read off
        -- the adult curve (neonatal blood with fetal haemoglobin sits on another curve: no reading).
        case when sao2_pct is not null and not coalesce(sao2_is_calculated, false)
                 then functional_saturation_pct(sao2_pct, cohb_pct, methb_pct)
             when age_group <> 'neonate' then predicted_sao2_pct end as arterial_saturation_pct,
        -- The target range, chosen before any status: the prescribed range (any age), else documented
        -- hypercapnic risk, else a PaCO2 above normal (both BTS 88-92 %), else the unit type's setting,
        -- else the standard 94-98 %. Without a prescribed range, children and neonates have no adult
        -- target, and a unit type may have none.
        case
            when prescribed_target_low_pct is not null and prescribed_target_high_pct is not null then 'prescription'
            when age_group in ('neonate', 'child') and unit_target_low_pct is null then null
            when not unit_assessed then null
            when coalesce(hypercapnic_risk, false) then 'hypercapnic_risk'
            when paco2_mmhg > $hypercapnic_paco2_mmhg then 'paco2_above_normal'
            when unit_target_low_pct is not null then 'unit_type'
            else 'standard'
        end as target_source
    from gas
),
status as (
    select
        *,
        case target_source
            when 'prescription' then prescribed_target_low_pct
            when 'hypercapnic_risk' then $hypercapnic_target_low
            when 'paco2_above_normal' then $hypercapnic_target_low
            when 'unit_type' then unit_target_low_pct
            when 'standard' then $target_low
        end as target_low_pct,
        case target_source
            when 'prescription' then prescribed_target_high_pct
            when 'hypercapnic_risk' then $hypercapnic_target_high
            when 'paco2_above_normal' then $hypercapnic_target_high
            when 'unit_type' then unit_target_high_pct
            when 'standard' then $target_high
        end as target_high_pct
    from metrics
)
select
    sample_id,
    age_years_used,
    age_source,
    age_group,
    unit_type,
    pb_mmhg,
    fio2_used,
    fio2_upper_bound,
    not oxygen_undocumented as oxygen_documented,
    gas_temperature_c,
    case when is_arterial_or_unknown then pao2_patient_temp_mmhg end as pao2_patient_temp_mmhg,
    case when is_arterial_or_unknown then paco2_patient_temp_mmhg end as paco2_patient_temp_mmhg,
    case when is_arterial_or_unknown then pao2_limit_patient_temp_mmhg end as pao2_limit_patient_temp_mmhg,
    case when is_arterial_or_unknown then pao2_alveolar_full_patient_temp_mmhg end
        as pao2_alveolar_full_patient_temp_mmhg,
    case when is_arterial_or_unknown then pao2_excess_over_limit_mmhg end as pao2_excess_over_limit_mmhg,
    case when is_arterial_or_unknown and gas_temperature_c is null
         then printf('patient temperature %.1f C is outside %.0f-%.0f C: the 37 C gases are not compared with the '
                     || 'alveolar PO2', temperature_c, $gas_temperature_min_c, $gas_temperature_max_c)
    end as alveolar_check_note,
    fio2_source,
    on_supplemental_oxygen,
    turnaround_min,
    -- oxygenation metrics: arterial (or unknown-type) samples only
    case when is_arterial_or_unknown then inspired_po2_mmhg end as inspired_po2_mmhg,
    case when is_arterial_or_unknown then pao2_alveolar_mmhg end as pao2_alveolar_mmhg,
    case when is_arterial_or_unknown then pao2_alveolar_full_mmhg end as pao2_alveolar_full_mmhg,
    case when is_arterial_or_unknown then pao2_alveolar_max_mmhg end as pao2_alveolar_max_mmhg,
    case when is_arterial_or_unknown then aa_gradient_mmhg end as aa_gradient_mmhg,
    case when is_arterial_or_unknown then aa_gradient_expected_mmhg end as aa_gradient_expected_mmhg,
    case when is_arterial_or_unknown then aa_gradient_mmhg - aa_gradient_expected_mmhg end as aa_gradient_excess_mmhg,
    case when is_arterial_or_unknown then a_over_a_ratio end as a_over_a_ratio,
    case when is_arterial_or_unknown then pf_ratio end as pf_ratio,
    case when is_arterial_or_unknown then pf_band end as pf_band,
    pf_band_peep_met,
    case when is_arterial_or_unknown then sf_ratio end as sf_ratio,
    case when is_arterial_or_unknown then oxygenation_index end as oxygenation_index,
    case when is_arterial_or_unknown then predicted_sao2_pct end as predicted_sao2_pct,
    case when is_arterial_or_unknown then sao2_residual_pct end as sao2_residual_pct,
    case when is_arterial_or_unknown then sao2_functional_pct end as sao2_functional_pct,
    case when is_arterial_or_unknown then sao2_curve_pct end as sao2_curve_pct,
    ph_predicted,
    acid_base_residual,
    winters_expected_paco2_mmhg,
    anion_gap_mmol_l,
    target_source,
    target_low_pct,
    target_high_pct,
    case when is_arterial_or_unknown then arterial_saturation_pct end as arterial_saturation_pct,
    episode_key,
    episode_basis,
    prescription_id,
    prescription_source,
    prescription_status,
    prescribed_target_low_pct,
    prescribed_target_high_pct,
    -- the arterial saturation against the prescribed range (ends inside)
    case
        when not is_arterial_or_unknown or arterial_saturation_pct is null or prescribed_target_low_pct is null then null
        when arterial_saturation_pct < prescribed_target_low_pct then 'below'
        when arterial_saturation_pct > prescribed_target_high_pct then 'above'
        else 'within'
    end as prescribed_target_position,
    -- a prescribed range that does not fit the documented hypercapnic risk: above the 88-92 % range
    -- for a patient at risk, or within it for a patient documented not at risk (BTS guideline
    -- ranges; local policy may differ, so this is a question for review, not an error)
    case
        when prescribed_target_high_pct is null or hypercapnic_risk is null then null
        when hypercapnic_risk then prescribed_target_high_pct > $hypercapnic_target_high
        else prescribed_target_high_pct <= $hypercapnic_target_high
    end as prescribed_target_conflicts_risk,
    -- The status follows the target chosen above; hypoxaemia is below that target and below the
    -- respiratory-failure limits, so a patient inside the 88-92 % target is in target.
    case
        when not is_arterial_or_unknown then null
        when pao2_mmhg is null then null
        when target_source is null then 'not_assessed'
        when coalesce(arterial_saturation_pct < target_low_pct, pao2_mmhg < $hypoxaemia_pao2_mmhg)
             and (pao2_mmhg < $hypoxaemia_pao2_mmhg or arterial_saturation_pct < $hypoxaemia_sat_pct) then 'hypoxaemic'
        when arterial_saturation_pct < target_low_pct then 'below_target'
        -- no oxygen documented (or room air documented) yet more oxygen than room air can give
        when (oxygen_undocumented or on_room_air) and pao2_beyond_room_air then 'undocumented_oxygen'
        when oxygen_undocumented then 'oxygen_unknown'
        when on_supplemental_oxygen and pao2_mmhg > $hyperoxaemia_pao2_mmhg then 'hyperoxaemic'
        when arterial_saturation_pct > target_high_pct and on_supplemental_oxygen then 'above_target_on_oxygen'
        else 'in_target'
    end as oxygen_status,
    case
        when not is_arterial_or_unknown then 'not an arterial sample'
        when pao2_mmhg is null then 'PaO2 missing'
        when paco2_mmhg is null then 'PaCO2 missing'
        when fio2_used is null then 'FiO2 not documented'
        when pb_mmhg is null then 'barometric pressure unknown'
    end as metrics_null_reason
from status;

create table if not exists derived as select * from derived_batch limit 0;

delete from derived where sample_id in (select sample_id from scope_samples);
insert into derived by name select * from derived_batch;
