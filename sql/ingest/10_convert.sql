-- Stage 1 of loading one export file: canonical units, hard limits and row checks, row by
-- row, into the temp table stage_units (pseudonyms and the content hash follow in
-- 15_keys_and_hash.sql, which needs the file's distinct identifiers). The loader runs this
-- SELECT as "create or replace temp table stage_units as ..." over the whole file parsed in
-- SQL (pipeline/ingest/engine.py), then as "insert into stage_units ..." for the rows the
-- Python parser read (the unusual ones).
-- Input: view stage_input (parsed records, values in the profile's units, per-row unit
-- columns <field>__unit where the profile names one, else NULL; __usual = every cell parsed
-- in SQL, __cells = the row's cells as text, __nonblank = bit mask of its non-blank cells).
-- Parameters: $unit_<field> = the unit the profile declares for that field.
-- Hard limits: temp table field_limits (canonical units, pipeline/schema.py); a parsed row
-- with any value outside them gets reason IMPLAUSIBLE and every such field, in name order,
-- in failed_columns.
-- record_id: the row's key under the name every record kind shares (30_classify.sql).
-- __cells is kept only for rows that are quarantined or were not parsed in SQL: the
-- quarantine keeps their original text.
-- Grain: one row per data record.
with converted as (
    select
        __row as source_row,
        sample_id,
        sample_id as record_id,
        patient_id,
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
        glucose_to_mmol_l(glucose_mmol_l, coalesce(glucose_mmol_l__unit, $unit_glucose_mmol_l)) as glucose_mmol_l,
        saturation_to_pct(cohb_pct, coalesce(cohb_pct__unit, $unit_cohb_pct)) as cohb_pct,
        saturation_to_pct(methb_pct, coalesce(methb_pct__unit, $unit_methb_pct)) as methb_pct,
        mean_airway_pressure_cmh2o,
        peep_cmh2o,
        hypercapnic_risk,
        encounter_id,
        saturation_to_pct(target_spo2_low_pct, coalesce(target_spo2_low_pct__unit, $unit_target_spo2_low_pct))
            as target_spo2_low_pct,
        saturation_to_pct(target_spo2_high_pct, coalesce(target_spo2_high_pct__unit, $unit_target_spo2_high_pct))
            as target_spo2_high_pct,
        o2_prescribed,
        collection_method,
        operator_id,
        __status as result_status,
        __reason as parse_reason,
        __failed as parse_failed,
        __usual,
        __cells,
        __nonblank
    from stage_input
),
limits as (
    select
        max(hard_min) filter (where field = 'age_years') as age_years__min,
        max(hard_max) filter (where field = 'age_years') as age_years__max,
        max(hard_min) filter (where field = 'barometric_pressure_mmhg') as barometric_pressure_mmhg__min,
        max(hard_max) filter (where field = 'barometric_pressure_mmhg') as barometric_pressure_mmhg__max,
        max(hard_min) filter (where field = 'base_excess_mmol_l') as base_excess_mmol_l__min,
        max(hard_max) filter (where field = 'base_excess_mmol_l') as base_excess_mmol_l__max,
        max(hard_min) filter (where field = 'cohb_pct') as cohb_pct__min,
        max(hard_max) filter (where field = 'cohb_pct') as cohb_pct__max,
        max(hard_min) filter (where field = 'glucose_mmol_l') as glucose_mmol_l__min,
        max(hard_max) filter (where field = 'glucose_mmol_l') as glucose_mmol_l__max,
        max(hard_min) filter (where field = 'methb_pct') as methb_pct__min,
        max(hard_max) filter (where field = 'methb_pct') as methb_pct__max,
        max(hard_min) filter (where field = 'cl_mmol_l') as cl_mmol_l__min,
        max(hard_max) filter (where field = 'cl_mmol_l') as cl_mmol_l__max,
        max(hard_min) filter (where field = 'fio2') as fio2__min,
        max(hard_max) filter (where field = 'fio2') as fio2__max,
        max(hard_min) filter (where field = 'hb_g_dl') as hb_g_dl__min,
        max(hard_max) filter (where field = 'hb_g_dl') as hb_g_dl__max,
        max(hard_min) filter (where field = 'hco3_mmol_l') as hco3_mmol_l__min,
        max(hard_max) filter (where field = 'hco3_mmol_l') as hco3_mmol_l__max,
        max(hard_min) filter (where field = 'k_mmol_l') as k_mmol_l__min,
        max(hard_max) filter (where field = 'k_mmol_l') as k_mmol_l__max,
        max(hard_min) filter (where field = 'lactate_mmol_l') as lactate_mmol_l__min,
        max(hard_max) filter (where field = 'lactate_mmol_l') as lactate_mmol_l__max,
        max(hard_min) filter (where field = 'mean_airway_pressure_cmh2o') as mean_airway_pressure_cmh2o__min,
        max(hard_max) filter (where field = 'mean_airway_pressure_cmh2o') as mean_airway_pressure_cmh2o__max,
        max(hard_min) filter (where field = 'na_mmol_l') as na_mmol_l__min,
        max(hard_max) filter (where field = 'na_mmol_l') as na_mmol_l__max,
        max(hard_min) filter (where field = 'o2_flow_l_min') as o2_flow_l_min__min,
        max(hard_max) filter (where field = 'o2_flow_l_min') as o2_flow_l_min__max,
        max(hard_min) filter (where field = 'paco2_mmhg') as paco2_mmhg__min,
        max(hard_max) filter (where field = 'paco2_mmhg') as paco2_mmhg__max,
        max(hard_min) filter (where field = 'pao2_mmhg') as pao2_mmhg__min,
        max(hard_max) filter (where field = 'pao2_mmhg') as pao2_mmhg__max,
        max(hard_min) filter (where field = 'peep_cmh2o') as peep_cmh2o__min,
        max(hard_max) filter (where field = 'peep_cmh2o') as peep_cmh2o__max,
        max(hard_min) filter (where field = 'ph') as ph__min,
        max(hard_max) filter (where field = 'ph') as ph__max,
        max(hard_min) filter (where field = 'sao2_pct') as sao2_pct__min,
        max(hard_max) filter (where field = 'sao2_pct') as sao2_pct__max,
        max(hard_min) filter (where field = 'spo2_pct') as spo2_pct__min,
        max(hard_max) filter (where field = 'spo2_pct') as spo2_pct__max,
        max(hard_min) filter (where field = 'target_spo2_low_pct') as target_spo2_low_pct__min,
        max(hard_max) filter (where field = 'target_spo2_low_pct') as target_spo2_low_pct__max,
        max(hard_min) filter (where field = 'target_spo2_high_pct') as target_spo2_high_pct__min,
        max(hard_max) filter (where field = 'target_spo2_high_pct') as target_spo2_high_pct__max,
        max(hard_min) filter (where field = 'temperature_c') as temperature_c__min,
        max(hard_max) filter (where field = 'temperature_c') as temperature_c__max
    from field_limits
),
checked as (
    select
        c.*,
        case
            when c.parse_reason is null then nullif(concat_ws('; ',
                case when c.age_years < l.age_years__min or c.age_years > l.age_years__max then 'age_years:IMPLAUSIBLE' end,
                case when c.barometric_pressure_mmhg < l.barometric_pressure_mmhg__min or c.barometric_pressure_mmhg > l.barometric_pressure_mmhg__max then 'barometric_pressure_mmhg:IMPLAUSIBLE' end,
                case when c.base_excess_mmol_l < l.base_excess_mmol_l__min or c.base_excess_mmol_l > l.base_excess_mmol_l__max then 'base_excess_mmol_l:IMPLAUSIBLE' end,
                case when c.cl_mmol_l < l.cl_mmol_l__min or c.cl_mmol_l > l.cl_mmol_l__max then 'cl_mmol_l:IMPLAUSIBLE' end,
                case when c.cohb_pct < l.cohb_pct__min or c.cohb_pct > l.cohb_pct__max then 'cohb_pct:IMPLAUSIBLE' end,
                case when c.fio2 < l.fio2__min or c.fio2 > l.fio2__max then 'fio2:IMPLAUSIBLE' end,
                case when c.glucose_mmol_l < l.glucose_mmol_l__min or c.glucose_mmol_l > l.glucose_mmol_l__max then 'glucose_mmol_l:IMPLAUSIBLE' end,
                case when c.hb_g_dl < l.hb_g_dl__min or c.hb_g_dl > l.hb_g_dl__max then 'hb_g_dl:IMPLAUSIBLE' end,
                case when c.hco3_mmol_l < l.hco3_mmol_l__min or c.hco3_mmol_l > l.hco3_mmol_l__max then 'hco3_mmol_l:IMPLAUSIBLE' end,
                case when c.k_mmol_l < l.k_mmol_l__min or c.k_mmol_l > l.k_mmol_l__max then 'k_mmol_l:IMPLAUSIBLE' end,
                case when c.lactate_mmol_l < l.lactate_mmol_l__min or c.lactate_mmol_l > l.lactate_mmol_l__max then 'lactate_mmol_l:IMPLAUSIBLE' end,
                case when c.mean_airway_pressure_cmh2o < l.mean_airway_pressure_cmh2o__min or c.mean_airway_pressure_cmh2o > l.mean_airway_pressure_cmh2o__max then 'mean_airway_pressure_cmh2o:IMPLAUSIBLE' end,
                case when c.methb_pct < l.methb_pct__min or c.methb_pct > l.methb_pct__max then 'methb_pct:IMPLAUSIBLE' end,
                case when c.na_mmol_l < l.na_mmol_l__min or c.na_mmol_l > l.na_mmol_l__max then 'na_mmol_l:IMPLAUSIBLE' end,
                case when c.o2_flow_l_min < l.o2_flow_l_min__min or c.o2_flow_l_min > l.o2_flow_l_min__max then 'o2_flow_l_min:IMPLAUSIBLE' end,
                case when c.paco2_mmhg < l.paco2_mmhg__min or c.paco2_mmhg > l.paco2_mmhg__max then 'paco2_mmhg:IMPLAUSIBLE' end,
                case when c.pao2_mmhg < l.pao2_mmhg__min or c.pao2_mmhg > l.pao2_mmhg__max then 'pao2_mmhg:IMPLAUSIBLE' end,
                case when c.peep_cmh2o < l.peep_cmh2o__min or c.peep_cmh2o > l.peep_cmh2o__max then 'peep_cmh2o:IMPLAUSIBLE' end,
                case when c.ph < l.ph__min or c.ph > l.ph__max then 'ph:IMPLAUSIBLE' end,
                case when c.sao2_pct < l.sao2_pct__min or c.sao2_pct > l.sao2_pct__max then 'sao2_pct:IMPLAUSIBLE' end,
                case when c.spo2_pct < l.spo2_pct__min or c.spo2_pct > l.spo2_pct__max then 'spo2_pct:IMPLAUSIBLE' end,
                case when c.target_spo2_high_pct < l.target_spo2_high_pct__min or c.target_spo2_high_pct > l.target_spo2_high_pct__max then 'target_spo2_high_pct:IMPLAUSIBLE' end,
                case when c.target_spo2_low_pct < l.target_spo2_low_pct__min or c.target_spo2_low_pct > l.target_spo2_low_pct__max then 'target_spo2_low_pct:IMPLAUSIBLE' end,
                case when c.temperature_c < l.temperature_c__min or c.temperature_c > l.temperature_c__max then 'temperature_c:IMPLAUSIBLE' end
            ), '')
        end as limits_failed
    from converted as c
    cross join limits as l
)
select
    * exclude (limits_failed, __cells),
    coalesce(parse_reason, case when limits_failed is not null then 'IMPLAUSIBLE' end) as reason_code,
    coalesce(parse_failed, limits_failed) as failed_columns,
    case when not __usual or parse_reason is not null or limits_failed is not null then __cells end as __cells
from checked;
