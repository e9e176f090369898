-- Stage 1 of loading one export file: canonical units.
-- Input: view stage_input (one row per parsed record, values in the profile's units,
-- per-row unit columns <field>__unit where the profile names one, else NULL).
-- Parameters: $unit_<field> = the unit the profile declares for that field.
-- Grain: one row per data record of the file.
create or replace temp table stage_converted as
select
    __row as source_row,
    sample_id,
    patient_id,
    patient_key,
    unit,
    analyser_id,
    age_years,
    birth_date,
    collected_at,
    resulted_at,
    sample_type,
    o2_device,
    o2_flow_l_min,
    fio2_to_fraction(fio2, coalesce(fio2__unit, $unit_fio2)) as fio2,
    pressure_to_mmhg(barometric_pressure_mmhg,
                     coalesce(barometric_pressure_mmhg__unit, $unit_barometric_pressure_mmhg))
        as barometric_pressure_mmhg,
    temperature_to_c(temperature_c, coalesce(temperature_c__unit, $unit_temperature_c)) as temperature_c,
    ph,
    pressure_to_mmhg(paco2_mmhg, coalesce(paco2_mmhg__unit, $unit_paco2_mmhg)) as paco2_mmhg,
    pressure_to_mmhg(pao2_mmhg, coalesce(pao2_mmhg__unit, $unit_pao2_mmhg)) as pao2_mmhg,
    hco3_mmol_l,
    base_excess_mmol_l,
    saturation_to_pct(sao2_pct, coalesce(sao2_pct__unit, $unit_sao2_pct)) as sao2_pct,
    sao2_is_calculated,
    saturation_to_pct(spo2_pct, coalesce(spo2_pct__unit, $unit_spo2_pct)) as spo2_pct,
    hb_to_g_dl(hb_g_dl, coalesce(hb_g_dl__unit, $unit_hb_g_dl)) as hb_g_dl,
    na_mmol_l,
    k_mmol_l,
    cl_mmol_l,
    lactate_to_mmol_l(lactate_mmol_l, coalesce(lactate_mmol_l__unit, $unit_lactate_mmol_l)) as lactate_mmol_l,
    mean_airway_pressure_cmh2o,
    peep_cmh2o,
    hypercapnic_risk,
    __status as result_status,
    __reason as parse_reason,
    __failed as parse_failed
from stage_input;
