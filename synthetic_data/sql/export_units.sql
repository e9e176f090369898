-- Demo-data writers: canonical values -> the units a mapping profile declares for its export.
-- Input view `canon` (canonical units); parameters name the declared unit of each column. The shared
-- macros convert *into* canonical units; these conversions are linear, so the way back is a division by
-- the macro's value for 1 unit. Temperature has an offset and uses its own macro.
SELECT
    c._row,
    c.paco2_mmhg / pressure_to_mmhg(1.0, $paco2_unit) AS paco2_mmhg,
    c.pao2_mmhg / pressure_to_mmhg(1.0, $pao2_unit) AS pao2_mmhg,
    c.barometric_pressure_mmhg / pressure_to_mmhg(1.0, $barometric_unit) AS barometric_pressure_mmhg,
    c.fio2 / fio2_to_fraction(1.0, $fio2_unit) AS fio2,
    c.sao2_pct / saturation_to_pct(1.0, $sao2_unit) AS sao2_pct,
    c.spo2_pct / saturation_to_pct(1.0, $spo2_unit) AS spo2_pct,
    CASE $temperature_unit
        WHEN 'C' THEN c.temperature_c
        WHEN 'F' THEN celsius_to_fahrenheit(c.temperature_c)
    END AS temperature_c,
    c.hb_g_dl / hb_to_g_dl(1.0, $hb_unit) AS hb_g_dl,
    c.lactate_mmol_l / lactate_to_mmol_l(1.0, $lactate_unit) AS lactate_mmol_l
FROM canon AS c
