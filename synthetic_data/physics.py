"""The demo generator's own physics, in numpy: an independent forward model.

Nothing here calls the pipeline's SQL formula macros: the detection figures would
otherwise only show that the pipeline agrees with itself. Where a reasonable alternative
exists, the formulation deliberately differs from the pipeline's (water vapour by the Antoine
equation, not Buck's fit; the alveolar gas equation in its full form with R drawn per sample;
the dissociation curve as a Hill equation with a per-patient P50 and Kelman-type shifts, not
Severinghaus's fit; temperature correction of PO2 by conserving the syringe's oxygen content,
not by a fitted coefficient). Each function states its formula, units and source; "from
memory" marks a constant recalled rather than checked against the source. The test file
(``tests/test_synthetic_data.py``) checks them against outside oracles (IAPWS-IF97 via
``iapws``, the 1976 standard atmosphere via ``ambiance`` and ``fluids``, published check values).

Conventions: pressures in mmHg, temperatures in degrees Celsius, fractions (not percent) for
FiO2 and saturations unless a name says ``pct``, concentrations in mmol/L, Hb in g/dL, oxygen
contents in mL O2 per dL of blood. Every function takes and returns numpy arrays (or floats)
and is vectorised.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

Array = npt.NDArray[np.float64]
ArrayLike = npt.ArrayLike

# --- units -------------------------------------------------------------------------------------------

PA_PER_MMHG = 133.322387415
"""Conventional millimetre of mercury in pascal (13.5951 g/cm3 x 9.80665 m/s2 x 1 mm; definition)."""
MMHG_PER_KPA = 1000.0 / PA_PER_MMHG
"""About 7.50062 mmHg per kPa."""
LACTATE_MG_DL_PER_MMOL_L = 9.008
"""Lactate: molar mass 90.08 g/mol, so 1 mmol/L = 9.008 mg/dL."""
GLUCOSE_MG_DL_PER_MMOL_L = 18.016
"""Glucose: molar mass 180.16 g/mol, so 1 mmol/L = 18.016 mg/dL."""


def celsius_to_fahrenheit(t_c: ArrayLike) -> Array:
    """degrees Fahrenheit = degrees Celsius x 9/5 + 32 (definition of the scales)."""
    return np.asarray(t_c, dtype=np.float64) * 1.8 + 32.0


# --- water vapour ------------------------------------------------------------------------------------

ANTOINE_WATER = (8.07131, 1730.63, 233.426)
"""Antoine constants A, B, C for liquid water, 1-100 C, in log10(P / mmHg) = A - B / (C + T / C).
Widely tabulated (e.g. Lange's Handbook of Chemistry); values from memory. Against IAPWS-IF97 they
read about 0.35 % low over 20-42 C (47.0 against 47.1 mmHg at 37 C)."""


def water_vapour_pressure_mmhg(t_c: ArrayLike) -> Array:
    """Saturation vapour pressure of water at ``t_c`` by the Antoine equation.

    Formula: log10(P) = A - B / (C + T), constants ``ANTOINE_WATER``; P in mmHg, T in C.
    Valid 1-100 C (the constants' range). Source: Antoine C 1888, C R Acad Sci 107:681 (form);
    constants as tabulated for water, from memory.
    """
    a, b, c = ANTOINE_WATER
    return np.power(10.0, a - b / (c + np.asarray(t_c, dtype=np.float64)))


# --- barometric pressure -----------------------------------------------------------------------------

ISA_SEA_LEVEL_PA = 101_325.0
ISA_SEA_LEVEL_K = 288.15
ISA_LAPSE_K_PER_M = 0.0065
ISA_G0 = 9.80665
ISA_R_AIR = 287.05287
"""Specific gas constant of dry air, J/(kg K), as the ICAO standard atmosphere states it (from memory)."""
EARTH_RADIUS_M = 6_356_766.0
"""Effective Earth radius for geopotential height in the 1976 standard atmosphere (from memory)."""


def standard_pressure_mmhg(altitude_m: ArrayLike) -> Array:
    """Station pressure at a geometric altitude in the troposphere of the standard atmosphere.

    Formula: geopotential height H = r h / (r + h); temperature T = T0 - L H; hydrostatic balance of
    an ideal gas with a constant lapse rate gives P = P0 (T / T0) ^ (g0 / (R_air L)).
    Constants: P0 101 325 Pa, T0 288.15 K, L 6.5 K/km, g0 9.806 65 m/s2, R_air 287.052 87 J/(kg K),
    r 6 356 766 m. Valid 0-11 km (one layer). Source: Manual of the ICAO Standard Atmosphere (Doc 7488,
    3rd ed. 1993), identical to the U.S. Standard Atmosphere 1976 below 32 km (from memory). A
    mid-latitude annual mean: weather moves real pressure by a few mmHg.
    """
    h = np.asarray(altitude_m, dtype=np.float64)
    geopotential = EARTH_RADIUS_M * h / (EARTH_RADIUS_M + h)
    temperature = ISA_SEA_LEVEL_K - ISA_LAPSE_K_PER_M * geopotential
    exponent = ISA_G0 / (ISA_R_AIR * ISA_LAPSE_K_PER_M)
    return ISA_SEA_LEVEL_PA * np.power(temperature / ISA_SEA_LEVEL_K, exponent) / PA_PER_MMHG


# --- alveolar gas --------------------------------------------------------------------------------------

AIR_O2_FRACTION = 0.2095
"""Oxygen in dry air (by volume; textbook value)."""


def alveolar_po2_mmhg(fio2: ArrayLike, paco2: ArrayLike, pb: ArrayLike, ph2o: ArrayLike, r: ArrayLike) -> Array:
    """Alveolar PO2 by the alveolar gas equation in its full (FiO2-corrected) form.

    Formula: PAO2 = FiO2 (PB - PH2O) - PACO2 (FiO2 + (1 - FiO2) / R), with PACO2 = PaCO2 and no
    inspired CO2. All pressures in mmHg at the patient's temperature (PH2O at body temperature).
    Source: Fenn WO, Rahn H, Otis AB 1946, Am J Physiol 146:637 (from memory). With R = 1 it is the
    highest alveolar PO2 any steady state allows: FiO2 (PB - PH2O) - PaCO2.
    """
    f = np.asarray(fio2, dtype=np.float64)
    return f * (np.asarray(pb) - np.asarray(ph2o)) - np.asarray(paco2) * (f + (1.0 - f) / np.asarray(r))


# --- acid-base ------------------------------------------------------------------------------------------

PK_CARBONIC = 6.1
CO2_SOLUBILITY = 0.0307
"""CO2 solubility in plasma, mmol/L per mmHg (with pK' 6.1: Henderson-Hasselbalch as analysers use it;
constants as quoted in analyser documentation citing CLSI C46-A, 2001)."""


def ph_from_hco3(pco2: ArrayLike, hco3: ArrayLike) -> Array:
    """Henderson-Hasselbalch: pH = pK' + log10(HCO3 / (alpha PCO2)), pK' 6.1, alpha 0.0307 mmol/L/mmHg."""
    return PK_CARBONIC + np.log10(np.asarray(hco3, dtype=np.float64) / (CO2_SOLUBILITY * np.asarray(pco2)))


def hco3_from_ph(ph: ArrayLike, pco2: ArrayLike) -> Array:
    """Henderson-Hasselbalch solved for bicarbonate: HCO3 = alpha PCO2 10^(pH - pK')."""
    return CO2_SOLUBILITY * np.asarray(pco2, dtype=np.float64) * np.power(10.0, np.asarray(ph) - PK_CARBONIC)


def standard_base_excess(ph: ArrayLike, hco3: ArrayLike) -> Array:
    """Base excess of the extracellular fluid (standard base excess), mmol/L.

    Formula: SBE = 0.93 (HCO3 - 24.4 + 14.8 (pH - 7.40)) - the Van Slyke equation with the
    haemoglobin of the extracellular fluid taken as about a third of blood's. Source: Siggaard-Andersen
    O 1977, Scand J Clin Lab Invest 37 Suppl 146:15 (from memory). Differs from the CLSI form by up to
    about 1 mmol/L in severe acidosis.
    """
    return 0.93 * (np.asarray(hco3, dtype=np.float64) - 24.4 + 14.8 * (np.asarray(ph) - 7.40))


# --- temperature of blood -------------------------------------------------------------------------------

PH_PER_C = -0.0147
"""Change of blood pH per C in a sealed sample (Rosenthal TB 1948, J Biol Chem 173:25; from memory)."""
LOG10_PCO2_PER_C = 0.021
"""Change of log10 PCO2 per C in a sealed sample (Bradley AF, Stupfel M, Severinghaus JW 1956,
J Appl Physiol 9:201; from memory). The pipeline uses Nunn's 0.019: a deliberate difference."""


# --- oxygen dissociation curve and oxygen content ---------------------------------------------------------

HILL_N = 2.7
"""Hill coefficient of adult haemoglobin over saturations 20-98 % (from memory)."""
P50_STANDARD = 26.8
"""P50 of adult blood at 37 C, pH 7.40, PCO2 40 mmHg (from memory; Severinghaus 1979 gives 26.8)."""
P50_SD_BETWEEN_PATIENTS = 1.5
"""Between-patient SD of the standard P50, mmHg (2,3-DPG, anaemia, stored blood; from memory)."""
P50_FETAL = 19.5
"""P50 of newborn blood rich in fetal haemoglobin (about 19-20 mmHg; from memory)."""
BOHR_LOG10_PER_PH = -0.40
"""d log10 P50 / d pH at constant PCO2 (Kelman GR 1966, J Appl Physiol 21:1375; from memory)."""
CO2_LOG10_PER_LOG10_PCO2 = 0.06
"""d log10 P50 / d log10 PCO2 at constant pH (Kelman 1966; from memory)."""
TEMP_LOG10_PER_C = 0.024
"""d log10 P50 / dT at constant pH (Kelman 1966; Severinghaus 1979; from memory)."""
HUFNER_ML_PER_G = 1.34
"""Oxygen bound by 1 g of fully saturated haemoglobin, mL (the value used clinically; from memory)."""
O2_SOLUBILITY_37 = 0.0031
"""Dissolved oxygen in blood at 37 C, mL O2 per dL per mmHg (from memory)."""
O2_SOLUBILITY_LN_PER_C = -0.014
"""d ln(O2 solubility) / dT: solubility rises about 1.4 % per C of cooling (Bunsen coefficient of
oxygen in water, 0.0239 at 37 C and 0.0283 at 25 C; from memory)."""


def p50_mmhg(p50_standard: ArrayLike, ph: ArrayLike, pco2: ArrayLike, t_c: ArrayLike) -> Array:
    """P50 of a blood at pH, PCO2 and temperature, from its P50 at standard conditions.

    Formula: log10 P50 = log10 P50std - 0.40 (pH - 7.40) + 0.06 log10(PCO2 / 40) + 0.024 (T - 37)
    (Bohr effect at constant PCO2, CO2 effect at constant pH, temperature at constant pH). Source:
    Kelman GR 1966, J Appl Physiol 21:1375 (coefficients from memory).
    """
    shift = (
        BOHR_LOG10_PER_PH * (np.asarray(ph, dtype=np.float64) - 7.40)
        + CO2_LOG10_PER_LOG10_PCO2 * np.log10(np.asarray(pco2, dtype=np.float64) / 40.0)
        + TEMP_LOG10_PER_C * (np.asarray(t_c, dtype=np.float64) - 37.0)
    )
    return np.asarray(p50_standard, dtype=np.float64) * np.power(10.0, shift)


def hill_saturation(po2: ArrayLike, p50: ArrayLike, n: float = HILL_N) -> Array:
    """Functional oxygen saturation (fraction) by the Hill equation: S = 1 / (1 + (P50 / PO2)^n).

    Source: Hill AV 1910, J Physiol 40 Suppl:iv (form); n and P50 as ``HILL_N`` and ``P50_STANDARD``.
    PO2 <= 0 gives 0.
    """
    p = np.maximum(np.asarray(po2, dtype=np.float64), 1e-9)
    return 1.0 / (1.0 + np.exp(n * (np.log(np.asarray(p50, dtype=np.float64)) - np.log(p))))


def hill_po2(saturation: ArrayLike, p50: ArrayLike, n: float = HILL_N) -> Array:
    """Inverse of ``hill_saturation``: PO2 = P50 (S / (1 - S))^(1/n), for 0 < S < 1."""
    s = np.asarray(saturation, dtype=np.float64)
    return np.asarray(p50, dtype=np.float64) * np.power(s / (1.0 - s), 1.0 / n)


def o2_solubility(t_c: ArrayLike) -> Array:
    """Dissolved-oxygen coefficient at ``t_c``, mL/dL/mmHg: 0.0031 exp(-0.014 (T - 37)) (see constants)."""
    return O2_SOLUBILITY_37 * np.exp(O2_SOLUBILITY_LN_PER_C * (np.asarray(t_c, dtype=np.float64) - 37.0))


def o2_content(po2: ArrayLike, hb_available: ArrayLike, p50: ArrayLike, t_c: ArrayLike) -> Array:
    """Oxygen content of blood, mL O2 per dL: 1.34 Hb S(PO2) + solubility(T) PO2.

    ``hb_available`` is the haemoglobin able to carry oxygen, g/dL (total Hb minus COHb and MetHb).
    """
    p = np.asarray(po2, dtype=np.float64)
    return HUFNER_ML_PER_G * np.asarray(hb_available) * hill_saturation(p, p50) + o2_solubility(t_c) * p


def po2_from_content(
    content: ArrayLike, hb_available: ArrayLike, p50: ArrayLike, t_c: ArrayLike, iterations: int = 7
) -> Array:
    """The PO2 at which blood holds ``content`` mL O2/dL (inverse of ``o2_content``).

    Safeguarded Newton iteration on ln PO2 within the bracket 0.5-3000 mmHg (content rises
    monotonically with PO2): a Newton step that leaves the bracket is replaced by bisection. The
    start is the PO2 of the saturation the content implies, or, where the content exceeds what
    saturated haemoglobin holds, the PO2 that dissolves the excess. Content at or below the
    bracket's lower end gives 0.5 mmHg.
    """
    c = np.asarray(content, dtype=np.float64)
    hb = np.broadcast_to(np.asarray(hb_available, dtype=np.float64), c.shape)
    ln_p50 = np.log(np.broadcast_to(np.asarray(p50, dtype=np.float64), c.shape))
    alpha = np.broadcast_to(o2_solubility(t_c), c.shape)
    capacity = HUFNER_ML_PER_G * hb
    lo = np.full(c.shape, np.log(0.5))
    hi = np.full(c.shape, np.log(3000.0))
    s0 = np.clip(c / np.maximum(capacity, 1e-9), 1e-4, 0.98)
    x_hb = ln_p50 + np.log(s0 / (1.0 - s0)) / HILL_N
    excess = c - capacity
    x_dissolved = np.log(np.maximum(excess, 1e-12) / alpha)
    x = np.clip(np.where(excess > alpha * np.exp(x_hb), x_dissolved, x_hb), lo, hi)
    for _ in range(iterations):
        p = np.exp(x)
        s = 1.0 / (1.0 + np.exp(HILL_N * (ln_p50 - x)))
        f = capacity * s + alpha * p - c
        slope = capacity * HILL_N * s * (1.0 - s) + alpha * p
        lo = np.where(f < 0.0, x, lo)
        hi = np.where(f > 0.0, x, hi)
        step = x - f / np.maximum(slope, 1e-12)
        x = np.where((step >= lo) & (step <= hi), step, 0.5 * (lo + hi))
    return np.exp(x)


def blood_at_temperature(
    po2: ArrayLike,
    pco2: ArrayLike,
    ph: ArrayLike,
    t_from: ArrayLike,
    t_to: ArrayLike,
    hb_available: ArrayLike,
    p50_standard: ArrayLike,
) -> tuple[Array, Array, Array]:
    """PO2, PCO2 and pH of a sealed blood sample taken from ``t_from`` to ``t_to`` (C).

    pH changes by -0.0147 per C (``PH_PER_C``) and log10 PCO2 by 0.021 per C (``LOG10_PCO2_PER_C``).
    PO2 follows from conserving the sample's oxygen content: the content at ``t_from`` (Hill curve
    with the P50 shifted for that temperature, pH and PCO2, plus dissolved oxygen at that
    temperature's solubility) is solved for the PO2 that holds it at ``t_to``. No fitted temperature
    coefficient is used; the test file compares the result with Severinghaus's published one.
    """
    dt = np.asarray(t_to, dtype=np.float64) - np.asarray(t_from, dtype=np.float64)
    ph_to = np.asarray(ph, dtype=np.float64) + PH_PER_C * dt
    pco2_to = np.asarray(pco2, dtype=np.float64) * np.power(10.0, LOG10_PCO2_PER_C * dt)
    content = o2_content(po2, hb_available, p50_mmhg(p50_standard, ph, pco2, t_from), t_from)
    po2_to = po2_from_content(content, hb_available, p50_mmhg(p50_standard, ph_to, pco2_to, t_to), t_to)
    return po2_to, pco2_to, ph_to


# --- pulse oximetry and co-oximetry ------------------------------------------------------------------------


def fractional_o2hb(functional_saturation: ArrayLike, cohb_pct: ArrayLike, methb_pct: ArrayLike) -> Array:
    """Oxyhaemoglobin as a fraction of total haemoglobin (what a co-oximeter reports as FO2Hb):
    functional saturation x (1 - (COHb + MetHb) / 100)."""
    dys = (np.asarray(cohb_pct, dtype=np.float64) + np.asarray(methb_pct, dtype=np.float64)) / 100.0
    return np.asarray(functional_saturation, dtype=np.float64) * (1.0 - dys)


def pulse_oximeter_reading_pct(functional_saturation: ArrayLike, cohb_pct: ArrayLike, methb_pct: ArrayLike) -> Array:
    """What an ideal two-wavelength pulse oximeter shows, percent, before its own error.

    It cannot tell carboxyhaemoglobin from oxyhaemoglobin (both absorb little red light), so it
    reads (O2Hb + COHb) / (O2Hb + COHb + HHb) = (FO2Hb + FCOHb) / (1 - FMetHb). The pull of
    methaemoglobin towards 85 % is ignored at the small MetHb levels generated here. Source: common
    practice (the physics of two-wavelength oximetry; from memory).
    """
    cohb = np.asarray(cohb_pct, dtype=np.float64) / 100.0
    methb = np.asarray(methb_pct, dtype=np.float64) / 100.0
    o2hb = fractional_o2hb(functional_saturation, cohb_pct, methb_pct)
    return 100.0 * (o2hb + cohb) / (1.0 - methb)


def functional_from_pulse_reading(reading_pct: ArrayLike, cohb_pct: ArrayLike, methb_pct: ArrayLike) -> Array:
    """Inverse of ``pulse_oximeter_reading_pct``: the functional saturation (fraction) behind a reading.

    From reading / 100 = (S (1 - COHb - MetHb) + COHb) / (1 - MetHb) (fractions):
    S = (reading / 100 (1 - MetHb) - COHb) / (1 - COHb - MetHb).
    """
    cohb = np.asarray(cohb_pct, dtype=np.float64) / 100.0
    methb = np.asarray(methb_pct, dtype=np.float64) / 100.0
    return (np.asarray(reading_pct, dtype=np.float64) / 100.0 * (1.0 - methb) - cohb) / (1.0 - cohb - methb)
