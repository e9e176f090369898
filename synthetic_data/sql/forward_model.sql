-- Demo-data forward model, step 1: each sample's true state at collection.
-- Input view `draws` (one row per sample, random inputs drawn by synthetic_data/hospital.py); the output
-- has the same rows in the same order, with only the computed columns.
-- Every physiological formula is a shared macro from sql/macros/; this file only combines them.
-- Parameter: $altitude_m, the invented hospital's altitude.
WITH site AS (
    SELECT
        d.*,
        round(barometric_pressure_from_altitude_mmhg($altitude_m) + d.pb_offset, 1) AS barometric_pressure_mmhg,
        -- a Venturi valve (also on a tracheostomy mask) runs at the flow printed for its setting,
        -- a fifth of them at 1.5 times that
        CASE WHEN d.true_device IN ('venturi_mask', 'tracheostomy_mask')
             THEN venturi_min_flow_l_min(d.fio2_set) * d.flow_factor
             ELSE d.flow END AS true_flow
    FROM draws AS d
),
inspired AS (
    SELECT
        s.*,
        CASE
            -- low-flow devices: around the table's expected FiO2, never outside its plausible range
            WHEN s.true_device IN ('room_air', 'nasal_cannula', 'simple_mask', 'reservoir_mask') THEN
                greatest(device_fio2_min(s.true_device, s.true_flow),
                         least(device_fio2_max(s.true_device, s.true_flow),
                               device_fio2_expected(s.true_device, s.true_flow)
                               + s.u_fio2 * CASE s.true_device WHEN 'nasal_cannula' THEN 0.03
                                                               WHEN 'simple_mask' THEN 0.06
                                                               WHEN 'reservoir_mask' THEN 0.08
                                                               ELSE 0.0 END))
            -- a Venturi mask delivers its setting or slightly less (entrained air at high inspiratory flow)
            WHEN s.true_device = 'venturi_mask' THEN s.fio2_set - 0.01 * least(abs(s.u_fio2), 2.0)
            -- set-FiO2 devices deliver the set value
            ELSE s.fio2_set
        END AS fio2_true,
        CASE
            WHEN s.true_device IN ('room_air', 'nasal_cannula', 'simple_mask', 'reservoir_mask') THEN
                round(device_fio2_expected(s.true_device, s.true_flow), 2)
            ELSE s.fio2_set
        END AS fio2_charted
    FROM site AS s
),
alveolar AS (
    SELECT
        i.*,
        alveolar_po2_simplified_mmhg(i.fio2_true, i.paco2_true, i.barometric_pressure_mmhg,
                                     water_vapour_pressure_mmhg(i.temperature_c)) AS pao2_alveolar_true,
        aa_gradient_expected_mmhg(i.age_years) * i.u_aa AS aa_base,
        least(0.85, power(i.severity_now, 1.5) * i.u_shunt) AS shunt
    FROM inspired AS i
),
arterial AS (
    SELECT
        a.*,
        -- PaO2: the alveolar PO2 minus an age-related gradient, then a disease-related share lost;
        -- never closer than 3 mmHg to the alveolar PO2 (so never above the R = 1 bound)
        greatest(least(38.0, a.pao2_alveolar_true - 3.0),
                 (a.pao2_alveolar_true - a.aa_base) * (1.0 - a.shunt)) AS pao2_true,
        henderson_hasselbalch_ph(a.paco2_true, a.hco3_true) AS ph_true
    FROM alveolar AS a
)
SELECT
    r._row,
    r.barometric_pressure_mmhg,
    r.true_flow,
    r.fio2_true,
    r.fio2_charted,
    r.pao2_true,
    -- the pulse oximeter reads the arterial saturation with its own error, whatever is done to the sample
    least(100.0, round(predicted_sao2_pct(r.pao2_true, r.ph_true, 37.0,
                                          base_excess_ecf_mmol_l(r.ph_true, r.hco3_true)) + r.u_spo2, 0))
        AS spo2_pct,
    -- venous blood of the same patient: lower PO2, higher PCO2, a little more bicarbonate
    least(r.u_venous_po2, r.pao2_true - 5.0) AS venous_po2,
    r.paco2_true + r.u_venous_pco2 AS venous_pco2,
    r.hco3_true + 1.0 AS venous_hco3
FROM arterial AS r
