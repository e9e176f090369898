-- Unit conversions into the store's canonical units: pressures in mmHg, FiO2 as a fraction,
-- saturations in percent, temperature in degrees Celsius, haemoglobin in g/dL, lactate in mmol/L.
--
-- Conventions for every macro in sql/macros/:
--   * one formula, one macro; other macros and the stage SQL call it, nothing re-implements it;
--   * numeric arguments are cast to DOUBLE, so integer or DECIMAL literals never change the arithmetic;
--   * NULL in -> NULL out; an unknown unit code -> NULL (never a guess);
--   * macros are TEMP: they belong to the connection that installed them (so a read-only store can
--     install them too); a second connection, including con.cursor(), must install its own;
--   * each macro's comment gives Formula, Units, Valid (domain), Source and Status
--     (verified / partially verified / from memory / common practice).
-- Unit codes are the ones a mapping profile may declare (pipeline/schema.py, UNIT_CHOICES).

-- kpa_to_mmhg(x)
--   Formula: mmHg = kPa * 1000 / 133.322387415   (1 kPa = 7.50062 mmHg)
--   Units:   x in kPa -> mmHg
--   Valid:   any pressure
--   Source:  conventional millimetre of mercury = 133.322387415 Pa (13.5951 g/cm3 x 1 mm x 9.80665 m/s2),
--            NIST Special Publication 811 (2008), Appendix B
--   Status:  verified (factor reproduced with the pint unit registry); NIST citation from memory
CREATE OR REPLACE TEMP MACRO kpa_to_mmhg(x) AS
    CAST(x AS DOUBLE) * 1000.0 / 133.322387415;

-- mmhg_to_kpa(x)
--   Formula: kPa = mmHg * 133.322387415 / 1000   (1 mmHg = 0.133322 kPa)
--   Units:   x in mmHg -> kPa
--   Valid:   any pressure
--   Source:  as kpa_to_mmhg (NIST Special Publication 811, 2008)
--   Status:  verified (pint)
CREATE OR REPLACE TEMP MACRO mmhg_to_kpa(x) AS
    CAST(x AS DOUBLE) * 133.322387415 / 1000.0;

-- fahrenheit_to_celsius(x)
--   Formula: C = (F - 32) * 5 / 9
--   Units:   x in degrees Fahrenheit -> degrees Celsius
--   Valid:   any temperature
--   Source:  definition of the Fahrenheit scale (NIST Special Publication 811, 2008)
--   Status:  verified (pint)
CREATE OR REPLACE TEMP MACRO fahrenheit_to_celsius(x) AS
    (CAST(x AS DOUBLE) - 32.0) * 5.0 / 9.0;

-- celsius_to_fahrenheit(x)
--   Formula: F = C * 9 / 5 + 32
--   Units:   x in degrees Celsius -> degrees Fahrenheit
--   Valid:   any temperature
--   Source:  definition of the Fahrenheit scale (NIST Special Publication 811, 2008)
--   Status:  verified (pint)
CREATE OR REPLACE TEMP MACRO celsius_to_fahrenheit(x) AS
    CAST(x AS DOUBLE) * 9.0 / 5.0 + 32.0;

-- pressure_to_mmhg(x, unit)
--   Formula: unit 'mmHg' -> x; 'kPa' -> kpa_to_mmhg(x); any other unit -> NULL
--   Units:   x in the named unit -> mmHg
--   Valid:   any pressure
--   Source:  as kpa_to_mmhg
--   Status:  verified (pint)
CREATE OR REPLACE TEMP MACRO pressure_to_mmhg(x, unit) AS
    CASE unit
        WHEN 'mmHg' THEN CAST(x AS DOUBLE)
        WHEN 'kPa' THEN kpa_to_mmhg(x)
    END;

-- fio2_to_fraction(x, unit)
--   Formula: unit 'fraction' -> x; 'percent' -> x / 100; any other unit -> NULL
--   Units:   x in the named unit -> fraction (0.21 = room air)
--   Valid:   any value (plausibility of the result is the rules stage's job)
--   Source:  definition of percent
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO fio2_to_fraction(x, unit) AS
    CASE unit
        WHEN 'fraction' THEN CAST(x AS DOUBLE)
        WHEN 'percent' THEN CAST(x AS DOUBLE) / 100.0
    END;

-- saturation_to_pct(x, unit)
--   Formula: unit 'percent' -> x; 'fraction' -> x * 100; any other unit -> NULL
--   Units:   x in the named unit -> percent
--   Valid:   any value
--   Source:  definition of percent
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO saturation_to_pct(x, unit) AS
    CASE unit
        WHEN 'percent' THEN CAST(x AS DOUBLE)
        WHEN 'fraction' THEN CAST(x AS DOUBLE) * 100.0
    END;

-- temperature_to_c(x, unit)
--   Formula: unit 'C' -> x; 'F' -> fahrenheit_to_celsius(x); any other unit -> NULL
--   Units:   x in the named unit -> degrees Celsius
--   Valid:   any temperature
--   Source:  as fahrenheit_to_celsius
--   Status:  verified (pint)
CREATE OR REPLACE TEMP MACRO temperature_to_c(x, unit) AS
    CASE unit
        WHEN 'C' THEN CAST(x AS DOUBLE)
        WHEN 'F' THEN fahrenheit_to_celsius(x)
    END;

-- hb_to_g_dl(x, unit)
--   Formula: 'g/dL' -> x; 'g/L' -> x / 10; 'mmol/L' -> x * 16114.5 / 10000
--            (haemoglobin counted per haem monomer, molar mass 16 114.5 g/mol, so 1 g/dL = 0.6206 mmol/L)
--   Units:   x in the named unit -> g/dL; any other unit -> NULL
--   Valid:   any value
--   Source:  monomer molar mass 16 114.5 g/mol as used by ICSH/IFCC for haemoglobin in mmol/L
--   Status:  factor 0.6206 common practice; molar mass from memory
CREATE OR REPLACE TEMP MACRO hb_to_g_dl(x, unit) AS
    CASE unit
        WHEN 'g/dL' THEN CAST(x AS DOUBLE)
        WHEN 'g/L' THEN CAST(x AS DOUBLE) / 10.0
        WHEN 'mmol/L' THEN CAST(x AS DOUBLE) * 16114.5 / 10000.0
    END;

-- lactate_to_mmol_l(x, unit)
--   Formula: 'mmol/L' -> x; 'mg/dL' -> x * 10 / 90.08   (1 mg/dL = 0.1110 mmol/L)
--   Units:   x in the named unit -> mmol/L; any other unit -> NULL
--   Valid:   any value
--   Source:  molar mass of lactic acid, C3H6O3, 90.08 g/mol (IUPAC standard atomic weights)
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO lactate_to_mmol_l(x, unit) AS
    CASE unit
        WHEN 'mmol/L' THEN CAST(x AS DOUBLE)
        WHEN 'mg/dL' THEN CAST(x AS DOUBLE) * 10.0 / 90.08
    END;

-- glucose_to_mmol_l(x, unit)
--   Formula: 'mmol/L' -> x; 'mg/dL' -> x * 10 / 180.156   (1 mmol/L = 18.016 mg/dL)
--   Units:   x in the named unit -> mmol/L; any other unit -> NULL
--   Valid:   any value
--   Source:  molar mass of glucose, C6H12O6, 180.156 g/mol (IUPAC standard atomic weights)
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO glucose_to_mmol_l(x, unit) AS
    CASE unit
        WHEN 'mmol/L' THEN CAST(x AS DOUBLE)
        WHEN 'mg/dL' THEN CAST(x AS DOUBLE) * 10.0 / 180.156
    END;
