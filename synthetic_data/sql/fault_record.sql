-- Demo-data faults made after the analyser reported: transcription and export errors on one value.
-- Input view `reported`: the chosen samples' reported values plus `fault`, `fault_field` (the canonical
-- column hit), `fault_mode`, `source` (the sample's export source) and `f_u1` (a uniform random number).
-- Output: the same rows with the value replaced, plus `value_before` and `value_after` (NULL after =
-- a text result). Rows with any other fault pass through unchanged.
WITH before AS (
    SELECT
        r.*,
        CASE WHEN r.fault IN ('ph_transcription', 'wrong_unit', 'decimal_slip', 'text_result') THEN
            CASE r.fault_field
                WHEN 'ph' THEN r.ph
                WHEN 'pao2_mmhg' THEN r.pao2_mmhg
                WHEN 'paco2_mmhg' THEN r.paco2_mmhg
                WHEN 'hb_g_dl' THEN r.hb_g_dl
                WHEN 'lactate_mmol_l' THEN r.lactate_mmol_l
                WHEN 'k_mmol_l' THEN r.k_mmol_l
            END
        END AS value_before,
        CAST(round(r.ph * 100) AS BIGINT) AS ph_centi
    FROM reported AS r
),
digits AS (
    SELECT
        b.*,
        (b.ph_centi // 10) % 10 AS ph_d1,
        b.ph_centi % 10 AS ph_d2
    FROM before AS b
),
written AS (
    SELECT
        d.*,
        CASE d.fault
            WHEN 'ph_transcription' THEN
                CASE
                    -- the two decimals swapped (7.34 -> 7.43); equal decimals fall back to the next mode
                    WHEN d.fault_mode = 'swap' AND d.ph_d1 <> d.ph_d2 THEN
                        (d.ph_centi - 9 * d.ph_d1 + 9 * d.ph_d2) / 100.0
                    -- one tenth off (7.34 -> 7.24 or 7.44)
                    WHEN d.fault_mode IN ('swap', 'tenth') THEN
                        round(d.value_before + CASE WHEN d.f_u1 < 0.5 THEN -0.1 ELSE 0.1 END, 2)
                    -- one hundredth off (7.34 -> 7.33 or 7.35)
                    ELSE round(d.value_before + CASE WHEN d.f_u1 < 0.5 THEN -0.01 ELSE 0.01 END, 2)
                END
            -- a pressure in the other unit, read as the column's unit. Where the column is in mmHg
            -- (US-style CSV, Parquet) the kPa number lands in it; where it is in kPa (European-style CSV)
            -- the mmHg number does, which the canonical record then holds as that many kPa.
            WHEN 'wrong_unit' THEN
                CASE WHEN d.source = 'eu_style' THEN kpa_to_mmhg(round(d.value_before, 1))
                     ELSE round(mmhg_to_kpa(d.value_before), 1)
                END
            -- the decimal mark one place off
            WHEN 'decimal_slip' THEN
                CASE WHEN d.fault_mode = 'times_10' THEN round(d.value_before * 10.0, 1)
                     ELSE round(d.value_before / 10.0, 2)
                END
            -- a text result: no number in the cell (the text is in the ground truth)
            WHEN 'text_result' THEN NULL
        END AS value_after
    FROM digits AS d
),
hit AS (
    SELECT
        w.*,
        w.fault IN ('ph_transcription', 'wrong_unit', 'decimal_slip', 'text_result') AS is_hit
    FROM written AS w
)
SELECT
    h.* EXCLUDE (ph_centi, ph_d1, ph_d2, is_hit) REPLACE (
        CASE WHEN h.is_hit AND h.fault_field = 'ph' THEN h.value_after ELSE h.ph END AS ph,
        CASE WHEN h.is_hit AND h.fault_field = 'pao2_mmhg' THEN h.value_after ELSE h.pao2_mmhg END AS pao2_mmhg,
        CASE WHEN h.is_hit AND h.fault_field = 'paco2_mmhg' THEN h.value_after ELSE h.paco2_mmhg END AS paco2_mmhg,
        CASE WHEN h.is_hit AND h.fault_field = 'hb_g_dl' THEN h.value_after ELSE h.hb_g_dl END AS hb_g_dl,
        CASE WHEN h.is_hit AND h.fault_field = 'lactate_mmol_l' THEN h.value_after ELSE h.lactate_mmol_l END
            AS lactate_mmol_l,
        CASE WHEN h.is_hit AND h.fault_field = 'k_mmol_l' THEN h.value_after ELSE h.k_mmol_l END AS k_mmol_l
    )
FROM hit AS h
