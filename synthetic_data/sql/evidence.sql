-- Physical evidence inside one record: the ways a blood gas record can contradict physics on its own.
-- The demo-data generator uses it to decide whether an injected fault is physically visible, and its
-- tests use it to show that clean records carry no such evidence. Input view `records` (canonical
-- columns). Thresholds are those of domain-methods.md: section 3 (PaO2 above the R = 1 alveolar bound
-- at the documented FiO2's upper plausible device bound, tolerance max(5 mmHg, 5 %)), section 6
-- (|acid-base residual| > 0.03), section 5 (measured SaO2 more than 4 points off the curve; SpO2 more
-- than 10 points off the arterial curve) and section 11 (plausible adult ranges). The pH, Hb and
-- lactate ranges are common practice.
WITH bound AS (
    SELECT
        r.*,
        CASE
            -- set-FiO2 devices (Venturi included): the charted FiO2 is the setting
            WHEN r.o2_device IN ('venturi_mask', 'high_flow_nasal', 'cpap', 'niv', 'invasive_ventilation',
                                 'tracheostomy_mask') THEN COALESCE(r.fio2, device_fio2_max(r.o2_device, r.o2_flow_l_min))
            -- low-flow devices: the upper plausible bound for the device and flow
            WHEN r.o2_device IN ('room_air', 'nasal_cannula', 'simple_mask', 'reservoir_mask') THEN
                device_fio2_max(r.o2_device, r.o2_flow_l_min)
            ELSE r.fio2
        END AS fio2_upper
    FROM records AS r
),
curve AS (
    SELECT
        b.*,
        alveolar_po2_max_mmhg(b.fio2_upper, b.paco2_mmhg, b.barometric_pressure_mmhg) AS pao2_alveolar_max,
        predicted_sao2_pct(b.pao2_mmhg, b.ph, 37.0, COALESCE(b.base_excess_mmol_l, 0.0))
            AS sao2_on_curve
    FROM bound AS b
)
SELECT
    c.sample_id,
    COALESCE(c.sample_type = 'arterial'
             AND c.pao2_mmhg > c.pao2_alveolar_max + greatest(5.0, 0.05 * c.pao2_alveolar_max), FALSE)
        AS pao2_above_alveolar,
    COALESCE(abs(acid_base_residual(c.ph, c.paco2_mmhg, c.hco3_mmol_l)) > 0.03, FALSE) AS acid_base_mismatch,
    COALESCE(NOT c.sao2_is_calculated AND abs(c.sao2_pct - c.sao2_on_curve) > 4.0, FALSE) AS sao2_off_curve,
    COALESCE(c.sample_type = 'arterial' AND abs(c.spo2_pct - c.sao2_on_curve) > 10.0, FALSE) AS spo2_discordant,
    COALESCE(c.pao2_mmhg < 20.0 OR c.pao2_mmhg > 700.0 OR c.paco2_mmhg < 10.0 OR c.paco2_mmhg > 150.0
             OR c.ph NOT BETWEEN 6.6 AND 7.9 OR c.hb_g_dl < 3.0 OR c.hb_g_dl > 25.0
             OR c.lactate_mmol_l < 0.2 OR c.lactate_mmol_l > 25.0, FALSE) AS out_of_range
FROM curve AS c
