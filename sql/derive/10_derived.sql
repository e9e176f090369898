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
        coalesce(r.sample_type, 'unknown') in ('arterial', 'unknown') as is_arterial_or_unknown,
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
                           base_excess := coalesce(base_excess_mmol_l, 0.0)) as predicted_sao2_pct
    from base
),
metrics as (
    select
        *,
        aa_gradient_mmhg(pao2_alveolar_mmhg, pao2_mmhg) as aa_gradient_mmhg,
        case when on_room_air then aa_gradient_expected_mmhg(age_years, method := $aa_method) end
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
             then sao2_pct - predicted_sao2_pct end as sao2_residual_pct,
        henderson_hasselbalch_ph(paco2_mmhg, hco3_mmol_l) as ph_predicted,
        acid_base_residual(ph, paco2_mmhg, hco3_mmol_l) as acid_base_residual,
        winters_expected_paco2_mmhg(hco3_mmol_l) as winters_expected_paco2_mmhg,
        anion_gap(na_mmol_l, cl_mmol_l, hco3_mmol_l) as anion_gap_mmol_l,
        fio2_used > $room_air_fio2_max
            or (fio2_used is null and o2_device is not null and o2_device not in ('room_air', 'unknown'))
            as on_supplemental_oxygen,
        coalesce(hypercapnic_risk, false) or paco2_mmhg > $hypercapnic_paco2_mmhg as hypercapnic_target_applies,
        -- The saturation of this arterial sample: measured by co-oximetry, else read off the curve.
        case when sao2_pct is not null and not coalesce(sao2_is_calculated, false) then sao2_pct
             else predicted_sao2_pct end as arterial_saturation_pct
    from gas
),
status as (
    select
        *,
        case when hypercapnic_target_applies then $hypercapnic_target_low else $target_low end as target_low_pct,
        case when hypercapnic_target_applies then $hypercapnic_target_high else $target_high end as target_high_pct
    from metrics
)
select
    sample_id,
    pb_mmhg,
    fio2_used,
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
    ph_predicted,
    acid_base_residual,
    winters_expected_paco2_mmhg,
    anion_gap_mmol_l,
    target_low_pct,
    target_high_pct,
    case when is_arterial_or_unknown then arterial_saturation_pct end as arterial_saturation_pct,
    case
        when not is_arterial_or_unknown then null
        when pao2_mmhg is null then null
        when pao2_mmhg < $hypoxaemia_pao2_mmhg or arterial_saturation_pct < $hypoxaemia_sat_pct then 'hypoxaemic'
        when on_supplemental_oxygen and pao2_mmhg > $hyperoxaemia_pao2_mmhg then 'hyperoxaemic'
        when arterial_saturation_pct < target_low_pct then 'below_target'
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
