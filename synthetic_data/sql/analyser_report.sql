-- Demo-data forward model, step 2: what the analyser reports for the blood in the syringe.
-- Input view `syringe` with the blood state (blood_po2, blood_pco2, blood_hco3, blood_lactate) and the
-- patient's stable values plus their within-patient noise. Measured: pH, PCO2, PO2, SaO2 (co-oximetry),
-- Hb, Na, K, Cl, lactate. Calculated by the analyser from the rounded measured values: HCO3, BE and, on
-- analysers without a co-oximeter (sao2_is_calculated), SaO2.
-- The curve is shifted for the sample's pH and base excess and read at 37 C (the analyser's PO2 and pH are
-- 37 C values), as the derive stage reads it (sql/derive), so a clean record's SaO2 sits on that curve.
WITH measured AS (
    SELECT
        s.*,
        round(henderson_hasselbalch_ph(s.blood_pco2, s.blood_hco3), 2) AS rep_ph,
        round(s.blood_pco2, 1) AS rep_paco2,
        round(s.blood_po2, 1) AS rep_pao2,
        round(s.blood_lactate, 1) AS rep_lactate,
        round(s.baseline_hb + s.u_hb, 1) AS rep_hb,
        round(s.baseline_na + s.u_na, 0) AS rep_na,
        round(s.baseline_k + s.u_k, 1) AS rep_k
    FROM syringe AS s
),
calculated AS (
    SELECT
        m.*,
        round(henderson_hasselbalch_hco3(m.rep_ph, m.rep_paco2), 1) AS rep_hco3
    FROM measured AS m
),
derived AS (
    SELECT
        c.*,
        round(base_excess_ecf_mmol_l(c.rep_ph, c.rep_hco3), 1) AS rep_be
    FROM calculated AS c
)
SELECT
    d._row,
    d.rep_ph AS ph,
    d.rep_paco2 AS paco2_mmhg,
    d.rep_pao2 AS pao2_mmhg,
    d.rep_hco3 AS hco3_mmol_l,
    d.rep_be AS base_excess_mmol_l,
    round(least(100.0, predicted_sao2_pct(d.rep_pao2, d.rep_ph, 37.0, d.rep_be)
                       + CASE WHEN d.sao2_is_calculated THEN 0.0 ELSE d.u_coox END), 1) AS sao2_pct,
    d.rep_hb AS hb_g_dl,
    d.rep_na AS na_mmol_l,
    d.rep_k AS k_mmol_l,
    -- chloride from the patient's own anion gap, so the electrolytes stay consistent
    round(d.rep_na - d.rep_hco3 - d.anion_gap, 0) AS cl_mmol_l,
    d.rep_lactate AS lactate_mmol_l
FROM derived AS d
