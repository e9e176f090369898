-- Blood gas physiology: every formula the derive and rules stages use, once.
-- Depends on 10_units.sql (kpa_to_mmhg). Conventions as stated at the top of 10_units.sql:
-- DOUBLE arithmetic, NULL in -> NULL out, and NULL (never an error, never inf/NaN) where a formula is
-- undefined (division by zero, logarithm of a non-positive number, outside the stated domain).
-- Pressures in mmHg, FiO2 as a fraction, saturations in percent, temperatures in degrees Celsius,
-- concentrations in mmol/L, airway pressures in cmH2O.

---------------------------------------------------------------------------------------------------
-- Gas pressures
---------------------------------------------------------------------------------------------------

-- water_vapour_pressure_mmhg(temp_c)
--   Formula: e_s[hPa] = 6.1121 * exp((18.678 - T/234.5) * T / (257.14 + T)), converted to mmHg
--            (about 47.1 mmHg at 37 C)
--   Units:   T in degrees Celsius -> saturation vapour pressure of liquid water in mmHg
--   Valid:   0..100 C (NULL outside); checked against IAPWS-IF97 to 0.1 % over 15..46 C
--   Source:  Buck AL 1981, J Appl Meteorol 20:1527 (form of the fit; these constants are, from memory,
--            Buck's later revision of it)
--   Status:  partially verified (values reproduced against IAPWS-IF97; citation from memory)
CREATE OR REPLACE TEMP MACRO water_vapour_pressure_mmhg(temp_c) AS
    CASE WHEN CAST(temp_c AS DOUBLE) BETWEEN 0.0 AND 100.0 THEN
        kpa_to_mmhg(0.61121 * exp(
            (18.678 - CAST(temp_c AS DOUBLE) / 234.5)
            * CAST(temp_c AS DOUBLE) / (257.14 + CAST(temp_c AS DOUBLE))))
    END;

-- barometric_pressure_from_altitude_mmhg(altitude_m)
--   Formula: H = r0 * h / (r0 + h), r0 = 6 356 766 m (geometric -> geopotential height);
--            P[Pa] = 101325 * (1 - L * H / T0) ^ (g0 * M / (R * L)),
--            T0 = 288.15 K, L = 0.0065 K/m, g0 = 9.80665 m/s2, M = 0.0289644 kg/mol, R = 8.31432 J/(mol K)
--   Units:   h = geometric altitude above mean sea level in m -> mmHg
--   Valid:   -610..11 000 m (troposphere; NULL outside). A mid-latitude annual mean: weather moves real
--            pressure by 1-2 %, and it underestimates pressure at equatorial high altitude. Prefer a
--            measured station pressure (not the sea-level-reduced weather-report value).
--   Source:  U.S. Standard Atmosphere, 1976 (NOAA/NASA/USAF, U.S. Government Printing Office)
--   Status:  verified (reproduced with the fluids and ambiance libraries)
CREATE OR REPLACE TEMP MACRO barometric_pressure_from_altitude_mmhg(altitude_m) AS
    CASE WHEN CAST(altitude_m AS DOUBLE) BETWEEN -610.0 AND 11000.0 THEN
        kpa_to_mmhg(101.325 * power(
            1.0 - 0.0065 * (6356766.0 * CAST(altitude_m AS DOUBLE) / (6356766.0 + CAST(altitude_m AS DOUBLE)))
                / 288.15,
            9.80665 * 0.0289644 / (8.31432 * 0.0065)))
    END;

-- effective_barometric_pressure_mmhg(recorded_mmhg, site_mmhg, site_altitude_m)
--   Formula: the record's own barometric pressure, else the site's configured pressure, else the
--            standard-atmosphere pressure at the site's altitude (barometric_pressure_from_altitude_mmhg)
--   Units:   mmHg, mmHg, m -> mmHg
--   Valid:   as the inputs
--   Source:  order of preference chosen for this product
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO effective_barometric_pressure_mmhg(recorded_mmhg, site_mmhg, site_altitude_m) AS
    COALESCE(CAST(recorded_mmhg AS DOUBLE), CAST(site_mmhg AS DOUBLE),
             barometric_pressure_from_altitude_mmhg(site_altitude_m));

-- inspired_po2_mmhg(fio2, pb_mmhg, ph2o_mmhg := 47.0)
--   Formula: PiO2 = FiO2 * (PB - PH2O)   (Dalton's law for humidified inspired gas)
--   Units:   FiO2 fraction, PB and PH2O in mmHg -> mmHg. PB is the station (not sea-level) pressure;
--            PH2O defaults to 47 mmHg, water vapour at 37 C. With ph2o_mmhg := 0 it gives the dry partial
--            pressure of any gas fraction (Dalton).
--   Valid:   PB > PH2O (NULL otherwise)
--   Source:  Dalton's law; 47 mmHg at 37 C is the clinical constant (IAPWS-IF97 gives 47.12)
--   Status:  verified
CREATE OR REPLACE TEMP MACRO inspired_po2_mmhg(fio2, pb_mmhg, ph2o_mmhg := 47.0) AS
    CASE WHEN CAST(pb_mmhg AS DOUBLE) > CAST(ph2o_mmhg AS DOUBLE) THEN
        CAST(fio2 AS DOUBLE) * (CAST(pb_mmhg AS DOUBLE) - CAST(ph2o_mmhg AS DOUBLE))
    END;

---------------------------------------------------------------------------------------------------
-- Alveolar gas equation
-- Assumes alveolar PCO2 = PaCO2, no inspired CO2 and a steady state; R (respiratory exchange ratio)
-- defaults to 0.8 (plausible 0.7-1.0).
---------------------------------------------------------------------------------------------------

-- alveolar_po2_simplified_mmhg(fio2, paco2_mmhg, pb_mmhg := 760.0, ph2o_mmhg := 47.0, rq := 0.8)
--   Formula: PAO2 = FiO2 * (PB - PH2O) - PaCO2 / R
--   Units:   FiO2 fraction, pressures in mmHg, R dimensionless -> mmHg
--   Valid:   PB > PH2O, R > 0 (NULL otherwise). The pipeline's default form for the A-a gradient.
--   Source:  alveolar gas equation, Fenn WO, Rahn H, Otis AB 1946, Am J Physiol 146:637
--   Status:  verified (formula); citation from memory
CREATE OR REPLACE TEMP MACRO alveolar_po2_simplified_mmhg(fio2, paco2_mmhg, pb_mmhg := 760.0, ph2o_mmhg := 47.0,
                                                     rq := 0.8) AS
    CASE WHEN CAST(rq AS DOUBLE) > 0.0 THEN
        inspired_po2_mmhg(fio2, pb_mmhg, ph2o_mmhg) - CAST(paco2_mmhg AS DOUBLE) / CAST(rq AS DOUBLE)
    END;

-- alveolar_po2_full_mmhg(fio2, paco2_mmhg, pb_mmhg := 760.0, ph2o_mmhg := 47.0, rq := 0.8)
--   Formula: PAO2 = FiO2 * (PB - PH2O) - PaCO2 * (FiO2 + (1 - FiO2) / R)   (FiO2-corrected form)
--   Units:   FiO2 fraction, pressures in mmHg, R dimensionless -> mmHg
--   Valid:   PB > PH2O, R > 0 (NULL otherwise)
--   Source:  Fenn WO, Rahn H, Otis AB 1946, Am J Physiol 146:637
--   Status:  verified (formula); citation from memory
CREATE OR REPLACE TEMP MACRO alveolar_po2_full_mmhg(fio2, paco2_mmhg, pb_mmhg := 760.0, ph2o_mmhg := 47.0,
                                               rq := 0.8) AS
    CASE WHEN CAST(rq AS DOUBLE) > 0.0 THEN
        inspired_po2_mmhg(fio2, pb_mmhg, ph2o_mmhg)
        - CAST(paco2_mmhg AS DOUBLE)
          * (CAST(fio2 AS DOUBLE) + (1.0 - CAST(fio2 AS DOUBLE)) / CAST(rq AS DOUBLE))
    END;

-- alveolar_po2_max_mmhg(fio2, paco2_mmhg, pb_mmhg := 760.0, ph2o_mmhg := 47.0)
--   Formula: PAO2_max = FiO2 * (PB - PH2O) - PaCO2   (the full form with R = 1)
--   Units:   FiO2 fraction, pressures in mmHg -> mmHg
--   Valid:   PB > PH2O (NULL otherwise). In a steady state R <= 1, so no arterial PO2 can exceed this
--            bound: the pipeline's default form for the "PaO2 above alveolar PO2" rule.
--   Source:  Fenn WO, Rahn H, Otis AB 1946, Am J Physiol 146:637 (the bound itself is derived here)
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO alveolar_po2_max_mmhg(fio2, paco2_mmhg, pb_mmhg := 760.0, ph2o_mmhg := 47.0) AS
    inspired_po2_mmhg(fio2, pb_mmhg, ph2o_mmhg) - CAST(paco2_mmhg AS DOUBLE);

---------------------------------------------------------------------------------------------------
-- Gradients and oxygenation indices
---------------------------------------------------------------------------------------------------

-- aa_gradient_mmhg(alveolar_po2, pao2)
--   Formula: A-a gradient = PAO2 - PaO2
--   Units:   mmHg -> mmHg
--   Valid:   any; the caller chooses the PAO2 form (pipeline default: simplified, R 0.8)
--   Source:  definition (alveolar gas equation, Fenn, Rahn & Otis 1946)
--   Status:  verified
CREATE OR REPLACE TEMP MACRO aa_gradient_mmhg(alveolar_po2, pao2) AS
    CAST(alveolar_po2 AS DOUBLE) - CAST(pao2 AS DOUBLE);

-- aa_gradient_expected_mmhg(age_years, method := 'age_over_4_plus_4')
--   Formula: 'age_over_4_plus_4'  -> age / 4 + 4              (default)
--            'age_plus_10_over_4' -> (age + 10) / 4
--            'mellemgaard_1966'   -> 2.5 + 0.21 * age
--            any other method -> NULL
--   Units:   age in years -> expected upper limit of the A-a gradient in mmHg
--   Valid:   age >= 0 (NULL otherwise); adults breathing room air only (on FiO2 1.0 the normal gradient
--            is 50-100 mmHg)
--   Source:  age/4 + 4 and (age + 10)/4: widely taught bedside rules, no primary source found;
--            2.5 + 0.21 * age: Mellemgaard K 1966, Acta Physiol Scand 67:10
--   Status:  common practice (first two); Mellemgaard partially verified (coefficients via a secondary source)
--   Default: age/4 + 4 - it is stated as an upper limit (Mellemgaard's line is a regression of the
--            mean, which half of healthy people exceed) and it is the most lenient of the three at every
--            age, so an audit flag on it is the least likely to be a false alarm.
CREATE OR REPLACE TEMP MACRO aa_gradient_expected_mmhg(age_years, method := 'age_over_4_plus_4') AS
    CASE WHEN CAST(age_years AS DOUBLE) >= 0.0 THEN
        CASE method
            WHEN 'age_over_4_plus_4' THEN CAST(age_years AS DOUBLE) / 4.0 + 4.0
            WHEN 'age_plus_10_over_4' THEN (CAST(age_years AS DOUBLE) + 10.0) / 4.0
            WHEN 'mellemgaard_1966' THEN 2.5 + 0.21 * CAST(age_years AS DOUBLE)
        END
    END;

-- arterial_alveolar_ratio(pao2, alveolar_po2)
--   Formula: a/A = PaO2 / PAO2
--   Units:   mmHg / mmHg -> dimensionless (normal about 0.75-0.8 or more)
--   Valid:   PAO2 > 0 (NULL otherwise)
--   Source:  Gilbert R, Keighley JF 1974, Am Rev Respir Dis 109:142
--   Status:  formula verified; citation and normal range from memory
CREATE OR REPLACE TEMP MACRO arterial_alveolar_ratio(pao2, alveolar_po2) AS
    CASE WHEN CAST(alveolar_po2 AS DOUBLE) > 0.0 THEN
        CAST(pao2 AS DOUBLE) / CAST(alveolar_po2 AS DOUBLE)
    END;

-- a_over_a_ratio(pao2, alveolar_po2)
--   Formula: the same a/A ratio under its short name (SQL names ignore case: a_over_A_ratio works too)
--   Units:   dimensionless
--   Valid:   as arterial_alveolar_ratio
--   Source:  Gilbert R, Keighley JF 1974, Am Rev Respir Dis 109:142
--   Status:  alias of arterial_alveolar_ratio
CREATE OR REPLACE TEMP MACRO a_over_a_ratio(pao2, alveolar_po2) AS
    arterial_alveolar_ratio(pao2, alveolar_po2);

-- pf_ratio(pao2_mmhg, fio2)
--   Formula: P/F = PaO2 / FiO2
--   Units:   PaO2 in mmHg, FiO2 fraction -> mmHg
--   Valid:   FiO2 > 0 (NULL otherwise); meaningful only when FiO2 is reliably known
--   Source:  ARDS Definition Task Force (Ranieri VM et al.) 2012, JAMA 307:2526
--   Status:  verified
CREATE OR REPLACE TEMP MACRO pf_ratio(pao2_mmhg, fio2) AS
    CASE WHEN CAST(fio2 AS DOUBLE) > 0.0 THEN CAST(pao2_mmhg AS DOUBLE) / CAST(fio2 AS DOUBLE) END;

-- pf_ratio_altitude_adjusted(pf, pb_mmhg)
--   Formula: P/F * (PB / 760)
--   Units:   mmHg, mmHg -> mmHg
--   Valid:   any; the Berlin definition applies it above 1000 m
--   Source:  ARDS Definition Task Force (Ranieri VM et al.) 2012, JAMA 307:2526
--   Status:  verified
CREATE OR REPLACE TEMP MACRO pf_ratio_altitude_adjusted(pf, pb_mmhg) AS
    CAST(pf AS DOUBLE) * CAST(pb_mmhg AS DOUBLE) / 760.0;

-- berlin_band(pf)
--   Formula: P/F <= 100 'severe'; 100 < P/F <= 200 'moderate'; 200 < P/F <= 300 'mild'; above 300 'none'
--            (a boundary value belongs to the lower, more severe band)
--   Units:   P/F in mmHg -> text
--   Valid:   P/F >= 0 (NULL otherwise). The Berlin bands apply only with PEEP or CPAP >= 5 cmH2O
--            (see berlin_peep_met) and to acute, bilateral, non-cardiac lung injury: a band is an
--            oxygenation category, not a diagnosis.
--   Source:  ARDS Definition Task Force (Ranieri VM et al.) 2012, JAMA 307:2526
--   Status:  verified
CREATE OR REPLACE TEMP MACRO berlin_band(pf) AS
    CASE
        WHEN CAST(pf AS DOUBLE) < 0.0 THEN NULL
        WHEN CAST(pf AS DOUBLE) <= 100.0 THEN 'severe'
        WHEN CAST(pf AS DOUBLE) <= 200.0 THEN 'moderate'
        WHEN CAST(pf AS DOUBLE) <= 300.0 THEN 'mild'
        WHEN CAST(pf AS DOUBLE) > 300.0 THEN 'none'
    END;

-- berlin_peep_met(peep_cmh2o)
--   Formula: PEEP (or CPAP) >= 5 cmH2O
--   Units:   cmH2O -> boolean; NULL when PEEP is not recorded (the band's precondition is then unknown)
--   Valid:   any
--   Source:  ARDS Definition Task Force (Ranieri VM et al.) 2012, JAMA 307:2526
--   Status:  verified
CREATE OR REPLACE TEMP MACRO berlin_peep_met(peep_cmh2o) AS
    CAST(peep_cmh2o AS DOUBLE) >= 5.0;

-- sf_ratio(spo2_pct, fio2)
--   Formula: S/F = SpO2 / FiO2
--   Units:   SpO2 in percent, FiO2 fraction -> percent per fraction (e.g. 92 / 0.36 = 255.6)
--   Valid:   FiO2 > 0 (NULL otherwise); its relation to P/F holds only for SpO2 <= 97 %
--   Source:  Rice TW et al. 2007, Chest 132:410
--   Status:  verified
CREATE OR REPLACE TEMP MACRO sf_ratio(spo2_pct, fio2) AS
    CASE WHEN CAST(fio2 AS DOUBLE) > 0.0 THEN CAST(spo2_pct AS DOUBLE) / CAST(fio2 AS DOUBLE) END;

-- sf_from_pf(pf)
--   Formula: S/F = 64 + 0.84 * P/F
--   Units:   P/F in mmHg -> S/F
--   Valid:   SpO2 <= 97 % (the regression's range)
--   Source:  Rice TW et al. 2007, Chest 132:410
--   Status:  partially verified (equation and its 235<->200, 315<->300 correspondences seen in secondary sources)
CREATE OR REPLACE TEMP MACRO sf_from_pf(pf) AS
    64.0 + 0.84 * CAST(pf AS DOUBLE);

-- pf_from_sf(sf)
--   Formula: P/F = (S/F - 64) / 0.84   (inverse of sf_from_pf)
--   Units:   S/F -> P/F in mmHg
--   Valid:   SpO2 <= 97 %
--   Source:  Rice TW et al. 2007, Chest 132:410
--   Status:  partially verified
CREATE OR REPLACE TEMP MACRO pf_from_sf(sf) AS
    (CAST(sf AS DOUBLE) - 64.0) / 0.84;

-- oxygenation_index(fio2, mean_airway_pressure_cmh2o, pao2_mmhg)
--   Formula: OI = FiO2 * MAP * 100 / PaO2   (MAP = mean airway pressure, not arterial pressure)
--   Units:   FiO2 fraction, MAP in cmH2O, PaO2 in mmHg -> dimensionless
--   Valid:   PaO2 > 0 (NULL otherwise); ventilated patients with MAP recorded
--   Source:  Pediatric Acute Lung Injury Consensus Conference Group 2015, Pediatr Crit Care Med 16:428
--   Status:  formula verified; citation from memory
CREATE OR REPLACE TEMP MACRO oxygenation_index(fio2, mean_airway_pressure_cmh2o, pao2_mmhg) AS
    CASE WHEN CAST(pao2_mmhg AS DOUBLE) > 0.0 THEN
        CAST(fio2 AS DOUBLE) * CAST(mean_airway_pressure_cmh2o AS DOUBLE) * 100.0 / CAST(pao2_mmhg AS DOUBLE)
    END;

---------------------------------------------------------------------------------------------------
-- Oxygen dissociation curve
---------------------------------------------------------------------------------------------------

-- severinghaus_saturation_pct(po2_mmhg)
--   Formula: S = 1 / (23400 / (P^3 + 150 P) + 1), written as 100 P (P^2 + 150) / (P (P^2 + 150) + 23400)
--            (no division by zero at P = 0; products instead of power() run about 3x faster)
--   Units:   PO2 in mmHg at standard conditions (37 C, pH 7.40, BE 0) -> saturation in percent
--   Valid:   PO2 >= 0 (NULL otherwise); fit error against the standard human curve about 0.55 points
--   Source:  Severinghaus JW 1979, J Appl Physiol 46:599
--   Status:  verified
CREATE OR REPLACE TEMP MACRO severinghaus_saturation_pct(po2_mmhg) AS
    CASE WHEN CAST(po2_mmhg AS DOUBLE) >= 0.0 THEN
        100.0 * CAST(po2_mmhg AS DOUBLE) * (CAST(po2_mmhg AS DOUBLE) * CAST(po2_mmhg AS DOUBLE) + 150.0)
        / (CAST(po2_mmhg AS DOUBLE) * (CAST(po2_mmhg AS DOUBLE) * CAST(po2_mmhg AS DOUBLE) + 150.0) + 23400.0)
    END;

-- severinghaus_po2_mmhg(saturation_pct)
--   Formula: exact inverse of severinghaus_saturation_pct (Cardano's solution of P^3 + 150 P = 2A):
--            A = 11700 / (1/S - 1) = 11700 * s / (100 - s) with s in percent,
--            u = (A + sqrt(50^3 + A^2))^(1/3),  P = u - 50 / u
--            (equal to (B + A)^(1/3) - (B - A)^(1/3) with B = sqrt(50^3 + A^2), without the cancellation)
--   Units:   saturation in percent -> PO2 in mmHg at standard conditions
--   Valid:   0 < s < 100 (NULL otherwise)
--   Source:  Severinghaus JW 1979, J Appl Physiol 46:599; inverse usually credited to Ellis RK 1989,
--            J Appl Physiol 67:902
--   Status:  verified (derived and round-trip tested); Ellis attribution from memory
CREATE OR REPLACE TEMP MACRO severinghaus_po2_mmhg(saturation_pct) AS
    CASE WHEN CAST(saturation_pct AS DOUBLE) > 0.0 AND CAST(saturation_pct AS DOUBLE) < 100.0 THEN
        power(11700.0 * CAST(saturation_pct AS DOUBLE) / (100.0 - CAST(saturation_pct AS DOUBLE))
              + sqrt(125000.0 + power(11700.0 * CAST(saturation_pct AS DOUBLE)
                                      / (100.0 - CAST(saturation_pct AS DOUBLE)), 2)), 1.0 / 3.0)
        - 50.0 / power(11700.0 * CAST(saturation_pct AS DOUBLE) / (100.0 - CAST(saturation_pct AS DOUBLE))
                       + sqrt(125000.0 + power(11700.0 * CAST(saturation_pct AS DOUBLE)
                                               / (100.0 - CAST(saturation_pct AS DOUBLE)), 2)), 1.0 / 3.0)
    END;

-- virtual_po2_mmhg(po2, ph := 7.40, temp_c := 37.0, base_excess := 0.0)
--   Formula: Pv = P * 10^(0.48 (pH - 7.40) - 0.024 (T - 37) - 0.0013 BE)
--            (the PO2 the same blood would have at 37 C, pH 7.40, BE 0)
--   Units:   PO2 in mmHg, pH, T in degrees Celsius, BE in mmol/L -> mmHg
--   Valid:   PO2 >= 0 (NULL otherwise)
--   Source:  Severinghaus JW 1979, J Appl Physiol 46:599
--   Status:  partially verified (BE term and structure via Inaba et al. 1986, Jpn J Physiol; Bohr factor
--            0.48 from memory)
CREATE OR REPLACE TEMP MACRO virtual_po2_mmhg(po2, ph := 7.40, temp_c := 37.0, base_excess := 0.0) AS
    CASE WHEN CAST(po2 AS DOUBLE) >= 0.0 THEN
        CAST(po2 AS DOUBLE) * power(10.0,
            0.48 * (CAST(ph AS DOUBLE) - 7.40)
            - 0.024 * (CAST(temp_c AS DOUBLE) - 37.0)
            - 0.0013 * CAST(base_excess AS DOUBLE))
    END;

-- predicted_sao2_pct(po2, ph := 7.40, temp_c := 37.0, base_excess := 0.0)
--   Formula: severinghaus_saturation_pct(virtual_po2_mmhg(po2, ph, temp_c, base_excess))
--   Units:   as virtual_po2_mmhg -> saturation in percent (functional)
--   Valid:   PO2 >= 0; comparisons with a measured SaO2 are informative only where the curve is steep
--            (predicted 70-97 %)
--   Source:  Severinghaus JW 1979, J Appl Physiol 46:599
--   Status:  partially verified (as virtual_po2_mmhg)
CREATE OR REPLACE TEMP MACRO predicted_sao2_pct(po2, ph := 7.40, temp_c := 37.0, base_excess := 0.0) AS
    severinghaus_saturation_pct(virtual_po2_mmhg(po2, ph, temp_c, base_excess));

-- functional_saturation_pct(sao2_pct, cohb_pct, methb_pct)
--   Formula: functional SO2 = FO2Hb / (1 - (FCOHb + FMetHb)); a missing dyshaemoglobin counts as 0
--   Units:   percent of total haemoglobin -> percent of haemoglobin able to carry oxygen
--   Valid:   COHb + MetHb < 100 % (NULL otherwise). The co-oximeter's oxyhaemoglobin fraction falls with
--            carboxy- and methaemoglobin; the dissociation curve and a pulse oximeter speak of functional
--            saturation.
--   Source:  fractional = functional x (1 - FCOHb - FMetHb) (CLSI C25-A, from memory; common practice)
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO functional_saturation_pct(sao2_pct, cohb_pct, methb_pct) AS
    CASE WHEN COALESCE(CAST(cohb_pct AS DOUBLE), 0.0) + COALESCE(CAST(methb_pct AS DOUBLE), 0.0) < 100.0 THEN
        CAST(sao2_pct AS DOUBLE)
        / (1.0 - (COALESCE(CAST(cohb_pct AS DOUBLE), 0.0) + COALESCE(CAST(methb_pct AS DOUBLE), 0.0)) / 100.0)
    END;

-- saturation_with_p50_shift_pct(po2, p50_shift_mmhg, ph := 7.40, base_excess := 0.0)
--   Formula: predicted_sao2_pct(po2 * 26.8 / (26.8 + d), ph, 37, BE): the standard curve moved so that its
--            P50 is 26.8 + d mmHg (a curve shifted along the log PO2 axis keeps its shape, so scaling PO2 by
--            the ratio of the P50s reads the shifted curve)
--   Units:   PO2 and shift in mmHg -> saturation in percent; d > 0 is a right shift (lower saturation)
--   Valid:   PO2 >= 0 and 26.8 + d > 0 (NULL otherwise)
--   Source:  standard P50 26.8 mmHg and the curve: Severinghaus JW 1979, J Appl Physiol 46:599; the
--            parallel shift on the log PO2 axis: common practice (the basis of virtual_po2_mmhg's factors)
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO saturation_with_p50_shift_pct(po2, p50_shift_mmhg, ph := 7.40, base_excess := 0.0) AS
    CASE WHEN 26.8 + CAST(p50_shift_mmhg AS DOUBLE) > 0.0 THEN
        predicted_sao2_pct(CAST(po2 AS DOUBLE) * 26.8 / (26.8 + CAST(p50_shift_mmhg AS DOUBLE)),
                           ph := ph, temp_c := 37.0, base_excess := base_excess)
    END;

---------------------------------------------------------------------------------------------------
-- Acid-base
-- CO2 solubility alpha = 0.0307 mmol/L per mmHg; pK' 6.1 by default (analysers following CLSI use 6.095).
---------------------------------------------------------------------------------------------------

-- henderson_hasselbalch_ph(paco2_mmhg, hco3, pk := 6.1)
--   Formula: pH = pK' + log10(HCO3 / (0.0307 * PCO2))
--   Units:   PCO2 in mmHg, HCO3 in mmol/L -> pH
--   Valid:   PCO2 > 0 and HCO3 > 0 (NULL otherwise)
--   Source:  Henderson-Hasselbalch equation; alpha and pK' as in CLSI C46-A (2001)
--   Status:  verified (constants as quoted in analyser manuals citing CLSI C46-A)
CREATE OR REPLACE TEMP MACRO henderson_hasselbalch_ph(paco2_mmhg, hco3, pk := 6.1) AS
    CASE WHEN CAST(paco2_mmhg AS DOUBLE) > 0.0 AND CAST(hco3 AS DOUBLE) > 0.0 THEN
        CAST(pk AS DOUBLE) + log10(CAST(hco3 AS DOUBLE) / (0.0307 * CAST(paco2_mmhg AS DOUBLE)))
    END;

-- henderson_hasselbalch_hco3(ph, paco2_mmhg, pk := 6.1)
--   Formula: HCO3 = 0.0307 * PCO2 * 10^(pH - pK')
--   Units:   pH, PCO2 in mmHg -> mmol/L
--   Valid:   PCO2 >= 0 (NULL otherwise)
--   Source:  Henderson-Hasselbalch equation; CLSI C46-A (2001)
--   Status:  verified
CREATE OR REPLACE TEMP MACRO henderson_hasselbalch_hco3(ph, paco2_mmhg, pk := 6.1) AS
    CASE WHEN CAST(paco2_mmhg AS DOUBLE) >= 0.0 THEN
        0.0307 * CAST(paco2_mmhg AS DOUBLE) * power(10.0, CAST(ph AS DOUBLE) - CAST(pk AS DOUBLE))
    END;

-- acid_base_residual(ph, paco2_mmhg, hco3, pk := 6.1)
--   Formula: measured pH - henderson_hasselbalch_ph(PCO2, HCO3, pK')
--   Units:   pH units. |residual| > 0.03 suggests the triplet is not from one sample as exported
--            (transcription, kPa/mmHg mix-up, lab-chemistry bicarbonate in the blood gas field)
--   Valid:   PCO2 > 0 and HCO3 > 0 (NULL otherwise)
--   Source:  Henderson-Hasselbalch equation; CLSI C46-A (2001)
--   Status:  verified (formula); the 0.03 tolerance is common practice
CREATE OR REPLACE TEMP MACRO acid_base_residual(ph, paco2_mmhg, hco3, pk := 6.1) AS
    CAST(ph AS DOUBLE) - henderson_hasselbalch_ph(paco2_mmhg, hco3, pk);

-- base_excess_blood_mmol_l(ph, hco3, hb_g_dl)
--   Formula: BE(B) = (1 - 0.014 Hb) * ((HCO3 - 24.8) + (1.43 Hb + 7.7) (pH - 7.4))
--   Units:   pH, HCO3 in mmol/L, Hb in g/dL -> mmol/L
--   Valid:   any
--   Source:  CLSI C46-A (2001)
--   Status:  verified (as quoted in analyser manuals citing CLSI C46-A)
CREATE OR REPLACE TEMP MACRO base_excess_blood_mmol_l(ph, hco3, hb_g_dl) AS
    (1.0 - 0.014 * CAST(hb_g_dl AS DOUBLE))
    * ((CAST(hco3 AS DOUBLE) - 24.8) + (1.43 * CAST(hb_g_dl AS DOUBLE) + 7.7) * (CAST(ph AS DOUBLE) - 7.4));

-- base_excess_ecf_mmol_l(ph, hco3)
--   Formula: BE(ecf) = HCO3 - 24.8 + 16.2 (pH - 7.4)
--   Units:   pH, HCO3 in mmol/L -> mmol/L
--   Valid:   any
--   Source:  CLSI C46-A (2001)
--   Status:  verified (as quoted in analyser manuals citing CLSI C46-A)
CREATE OR REPLACE TEMP MACRO base_excess_ecf_mmol_l(ph, hco3) AS
    CAST(hco3 AS DOUBLE) - 24.8 + 16.2 * (CAST(ph AS DOUBLE) - 7.4);

-- winters_expected_paco2_mmhg(hco3)
--   Formula: expected PaCO2 = 1.5 * HCO3 + 8 (+/- 2 mmHg) in a primary metabolic acidosis
--   Units:   HCO3 in mmol/L -> mmHg
--   Valid:   metabolic acidosis only; an interpretation aid, not a data-integrity rule
--   Source:  Albert MS, Dell RB, Winters RW 1967, Ann Intern Med 66:312
--   Status:  formula verified; citation from memory
CREATE OR REPLACE TEMP MACRO winters_expected_paco2_mmhg(hco3) AS
    1.5 * CAST(hco3 AS DOUBLE) + 8.0;

-- anion_gap(na, cl, hco3, k := NULL)
--   Formula: AG = Na + K - (Cl + HCO3); without K when k is not given or is NULL
--   Units:   mmol/L -> mmol/L. With ion-selective electrodes the reference interval is about 3-11
--            (without K) and is analyser-specific. A column of K values that has NULLs gives a column that
--            mixes both definitions: filter on K first when that matters.
--   Valid:   any
--   Source:  Winter SD et al. 1990, Arch Intern Med 150:311 (reference interval); formula common practice
--   Status:  verified
CREATE OR REPLACE TEMP MACRO anion_gap(na, cl, hco3, k := NULL) AS
    CAST(na AS DOUBLE) + COALESCE(CAST(k AS DOUBLE), 0.0) - CAST(cl AS DOUBLE) - CAST(hco3 AS DOUBLE);

---------------------------------------------------------------------------------------------------
-- Temperature correction: values measured at 37 C -> the patient's temperature T
---------------------------------------------------------------------------------------------------

-- ph_at_temperature(ph37, temp_c)
--   Formula: pH_T = pH37 + (-0.0147 + 0.0065 (7.40 - pH37)) (T - 37)
--   Units:   pH at 37 C, T in degrees Celsius -> pH at T
--   Valid:   body temperatures (about 25-45 C); identity at 37 C
--   Source:  Ashwood ER, Kost G, Kenny M 1983, Clin Chem; as used by CLSI C46
--   Status:  formula verified; attribution from memory
CREATE OR REPLACE TEMP MACRO ph_at_temperature(ph37, temp_c) AS
    CAST(ph37 AS DOUBLE)
    + (-0.0147 + 0.0065 * (7.40 - CAST(ph37 AS DOUBLE))) * (CAST(temp_c AS DOUBLE) - 37.0);

-- pco2_at_temperature_mmhg(pco2_37, temp_c)
--   Formula: PCO2_T = PCO2_37 * 10^(0.019 (T - 37))
--   Units:   mmHg at 37 C, T in degrees Celsius -> mmHg at T
--   Valid:   body temperatures (about 25-45 C); identity at 37 C
--   Source:  Nunn JF et al. 1965, J Appl Physiol (0.019 per C in fresh human blood)
--   Status:  verified (abstract)
CREATE OR REPLACE TEMP MACRO pco2_at_temperature_mmhg(pco2_37, temp_c) AS
    CAST(pco2_37 AS DOUBLE) * power(10.0, 0.019 * (CAST(temp_c AS DOUBLE) - 37.0));

-- po2_at_temperature_mmhg(po2_37, temp_c)
--   Formula: PO2_T = PO2_37 * 10^(f (T - 37)),
--            f = (5.49e-11 P^3.88 + 0.071) / (9.72e-9 P^3.88 + 2.30), P = PO2 at 37 C
--            (the log10 form of d ln P / dT = 0.058 / (0.243 (P/100)^3.88 + 1) + 0.013)
--   Units:   mmHg at 37 C, T in degrees Celsius -> mmHg at T
--   Valid:   PO2 >= 0 (NULL otherwise); body temperatures; identity at 37 C
--   Source:  Severinghaus JW 1979, J Appl Physiol 46:599 (equation 3)
--   Status:  verified (formula as used by instruments; equal to equation 3)
CREATE OR REPLACE TEMP MACRO po2_at_temperature_mmhg(po2_37, temp_c) AS
    CASE WHEN CAST(po2_37 AS DOUBLE) >= 0.0 THEN
        CAST(po2_37 AS DOUBLE) * power(10.0,
            (5.49e-11 * power(CAST(po2_37 AS DOUBLE), 3.88) + 0.071)
            / (9.72e-9 * power(CAST(po2_37 AS DOUBLE), 3.88) + 2.30)
            * (CAST(temp_c AS DOUBLE) - 37.0))
    END;

---------------------------------------------------------------------------------------------------
-- Delta checks
---------------------------------------------------------------------------------------------------

-- reference_change_value_pct(cv_analytical_pct, cv_within_subject_pct, z := 1.96)
--   Formula: RCV = sqrt(2) * Z * sqrt(CVa^2 + CVi^2)
--   Units:   CVs in percent -> percent; Z 1.96 two-sided, 1.645 one-sided (95 %)
--   Valid:   any CVs
--   Source:  Harris EK, Yasaka T 1983, Clin Chem 29:25
--   Status:  formula verified; citation from memory
CREATE OR REPLACE TEMP MACRO reference_change_value_pct(cv_analytical_pct, cv_within_subject_pct, z := 1.96) AS
    sqrt(2.0) * CAST(z AS DOUBLE)
    * sqrt(power(CAST(cv_analytical_pct AS DOUBLE), 2) + power(CAST(cv_within_subject_pct AS DOUBLE), 2));

-- delta_check_limit(level, cv_analytical_pct, cv_within_subject_pct, rate_per_hour, hours)
--   Formula: |level| * RCV% / 100 + rate * hours, RCV% = reference_change_value_pct(CVa, CVi) (two-sided 95 %)
--            (the change that analytical and biological variation explain in a stable patient, plus the
--            change a treated patient's value can make in the hours between the two samples)
--   Units:   level in the analyte's unit, CVs in percent, rate in the analyte's unit per hour, hours -> the
--            analyte's unit
--   Valid:   hours >= 0 (NULL otherwise)
--   Source:  RCV: Harris EK, Yasaka T 1983, Clin Chem 29:25 (from memory); the time allowance: common practice
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO delta_check_limit(level, cv_analytical_pct, cv_within_subject_pct, rate_per_hour, hours) AS
    CASE WHEN CAST(hours AS DOUBLE) >= 0.0 THEN
        abs(CAST(level AS DOUBLE)) * reference_change_value_pct(cv_analytical_pct, cv_within_subject_pct) / 100.0
        + CAST(rate_per_hour AS DOUBLE) * CAST(hours AS DOUBLE)
    END;
