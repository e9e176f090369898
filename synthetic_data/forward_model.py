"""Forward model of the demo data: from a patient's state to what the analyser reports.

All physics is the generator's own (``physics.py``, ``devices.py``, numpy); nothing here uses the
pipeline's SQL macros. The steps, per sample:

1. **Site pressure.** ``standard_pressure_mmhg`` at the invented hospital's altitude, plus a
   day-to-day weather offset (SD 4 mmHg, clipped at 3 SD), rounded to 0.1 mmHg.
2. **Inspired oxygen.** The device table of ``devices.py``: low-flow devices deliver an FiO2 that
   varies with the breathing pattern within the device's range and the chart shows the bedside
   estimate; Venturi valves deliver their setting or up to 0.02 less; set-FiO2 devices deliver
   and chart the setting.
3. **Acid-base at body temperature.** PaCO2 and bicarbonate are drawn by ``hospital.py``;
   pH = Henderson-Hasselbalch (pK' 6.1, alpha 0.0307).
4. **Oxygenation at body temperature.** Alveolar PO2 by the full alveolar gas equation with the
   sample's own R (0.75-0.95) and water vapour at the patient's temperature (Antoine). End-capillary
   PO2 = PAO2 minus a small V/Q gradient (``vq_factor`` x (1 + 0.12 x age) mmHg). The arterial
   oxygen content is the end-capillary content diluted by the venous admixture (shunt fraction
   Qs, arterial-venous content difference D): Ca = Cc' - D Qs / (1 - Qs); PaO2 is the PO2 that holds
   Ca on the patient's own curve (Hill, per-patient P50 shifted for pH, PCO2 and temperature),
   never below min(30, PAO2 - 3) mmHg. This shunt model gives a small A-a gradient on air and a
   large one (50-100 mmHg for a few per cent of shunt) on 100 % oxygen, as in healthy lungs.
   Look-alikes may set ``pao2_target`` or ``sat_target`` (the PO2 of that saturation on the
   patient's curve; either capped at PAO2 - 3) or, on cardiopulmonary bypass,
   ``oxygenator_efficiency``: PaO2 = efficiency x (FiO2 (PB - PH2O) - PaCO2).
5. **Pulse oximetry** reads the blood in the patient: ``pulse_oximeter_reading_pct`` (COHb counted
   as oxyhaemoglobin) plus the patient's error (``oximeter_bias``; for the pigmented fifth, a further
   ``oximeter_extra`` points scaled from 0 at 97 % to the full amount at 88 % and below), rounded,
   capped at 100. NULL where no SpO2 was recorded (on bypass). It belongs to the patient, so it
   does not change when the sample is spoiled.
6. **The syringe** holds arterial blood, or for samples really taken from a vein (labelled venous,
   or the fault ``venous_as_arterial``) venous blood: content Ca - D, PCO2 2-10 mmHg higher, HCO3
   1 mmol/L higher, its PO2 solved on the curve (at least 22 mmHg at 37 C).
7. **The analyser** warms the sealed sample to 37 C (``blood_at_temperature``: pH and PCO2 by fixed
   coefficients, PO2 by conserving the oxygen content) and reports pH (2 decimals), PCO2 and PO2
   (1 decimal, mmHg), Hb, Na, K, Cl, glucose, lactate, and by co-oximetry FO2Hb (``sao2_pct``, the
   oxyhaemoglobin fraction of total Hb: the functional saturation at 37 C times 1 - (COHb + MetHb)),
   COHb and MetHb, each with a small analytical error. It calculates HCO3 from the rounded pH and
   PCO2 and the standard base excess. On analysers without a co-oximeter (``sao2_is_calculated``)
   SaO2 is calculated from PO2 and pH with a standard adult curve and COHb and MetHb are not reported.
8. **Times.** Collected on a whole minute (a morning-round bump around 06:00 UTC), resulted 2-28
   minutes later (log-normal; point-of-care median 3-4 min, laboratory 11-12 min).

Faults (``faults.py``) change the syringe, the documentation or the transcription, and the
analyser step is re-run where the blood changed.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from pipeline.schema import FIELDS  # the canonical column list only; no formula comes from the pipeline
from synthetic_data import devices as dev
from synthetic_data import physics as phys
from synthetic_data import titration
from synthetic_data.hospital import UNIT_TYPES

CANONICAL_COLUMNS: tuple[str, ...] = tuple(f.name for f in FIELDS)
HIGH_FLOW_UNIT_TYPES = ("critical_care", "emergency")
"""Unit types where a patient the device cannot oxygenate is moved to high-flow nasal oxygen (invented)."""

REPORTED = (
    "ph",
    "paco2_mmhg",
    "pao2_mmhg",
    "hco3_mmol_l",
    "base_excess_mmol_l",
    "sao2_pct",
    "hb_g_dl",
    "na_mmol_l",
    "k_mmol_l",
    "cl_mmol_l",
    "lactate_mmol_l",
    "glucose_mmol_l",
    "cohb_pct",
    "methb_pct",
)
"""Columns the analyser step writes."""
STATE_COLUMNS: tuple[str, ...] = tuple(c for c in CANONICAL_COLUMNS if c not in REPORTED)
"""Canonical columns that come from the sample's label and chart rather than from the analyser."""

SYRINGE = (
    "blood_po2",
    "blood_pco2",
    "blood_hco3",
    "blood_hb",
    "blood_na",
    "blood_k",
    "blood_cl",
    "blood_glucose",
    "blood_lactate",
    "blood_cohb",
    "blood_methb",
)
"""What is in the syringe, at 37 C (gases in mmHg, HCO3 in mmol/L)."""
NOISE = ("u_coox", "u_hb", "u_na", "u_k", "u_cl", "u_glucose", "u_cohb", "u_methb")
"""Analytical errors of one measurement, drawn once per sample (faults re-measure with the same)."""


def _np(frame: pl.DataFrame, name: str) -> np.ndarray:
    return frame.get_column(name).cast(pl.Float64).to_numpy()


def _arterial_po2(
    pao2_alveolar: np.ndarray,
    end_capillary_gradient: np.ndarray,
    shunt: np.ndarray,
    av_diff: np.ndarray,
    hb_available: np.ndarray,
    p50: np.ndarray,
    t_c: np.ndarray,
) -> np.ndarray:
    """Step 4: arterial PO2 from the alveolar PO2 through the end-capillary blood and the shunt."""
    pc = np.maximum(pao2_alveolar - end_capillary_gradient, 15.0)
    cc = phys.o2_content(pc, hb_available, p50, t_c)
    ca = cc - av_diff * shunt / (1.0 - shunt)
    pao2 = phys.po2_from_content(np.maximum(ca, 0.05), hb_available, p50, t_c)
    return np.maximum(pao2, np.minimum(30.0, pao2_alveolar - 3.0))


def true_state(draws: pl.DataFrame, altitude_m: float, rng: np.random.Generator) -> pl.DataFrame:
    """Steps 1-6: each sample's true state, the chart beside it and the blood in its syringe at 37 C.

    Returns ``draws`` with the computed columns added; ``rng`` draws the analytical errors.
    """
    n = draws.height
    device = draws.get_column("device_idx").to_numpy()
    flow = _np(draws, "flow")
    fio2_set = _np(draws, "fio2_set")
    t = _np(draws, "temperature_c")
    paco2 = _np(draws, "paco2_true")
    hco3 = _np(draws, "hco3_true")
    hb = _np(draws, "hb_true")
    cohb = _np(draws, "cohb_true")
    methb = _np(draws, "methb_true")
    p50_std = _np(draws, "p50_std")
    shunt = _np(draws, "shunt")
    av_diff = _np(draws, "av_diff")

    # 1. pressure; the patient's blood and lungs at body temperature
    pb = np.round(phys.standard_pressure_mmhg(altitude_m) + _np(draws, "pb_offset"), 1)
    ph2o = phys.water_vapour_pressure_mmhg(t)
    ph = phys.ph_from_hco3(paco2, hco3)
    hb_available = hb * (1.0 - (cohb + methb) / 100.0)
    p50 = phys.p50_mmhg(p50_std, ph, paco2, t)
    gradient = _np(draws, "vq_factor") * (1.0 + 0.12 * _np(draws, "age_exact"))
    rq = _np(draws, "rq")
    u_breathing = _np(draws, "u_breathing")
    u_venturi = _np(draws, "u_venturi")

    # 1b. oxygen titrated towards the target in force (titration.py); look-alikes and room air are not
    if "aim_spo2" in draws.columns:
        sat_aim = titration.aimed_saturation(
            _np(draws, "aim_spo2"),
            _np(draws, "oximeter_bias"),
            _np(draws, "oximeter_extra"),
            cohb,
            methb,
            _np(draws, "u_drift"),
        )
        need = titration.required_fio2(sat_aim, p50, hb_available, t, shunt, av_diff, gradient, paco2, pb, ph2o, rq)
        device, flow, fio2_set = titration.set_devices(
            device,
            flow,
            fio2_set,
            need,
            u_breathing,
            u_venturi,
            _np(draws, "u_wean"),
            (draws.get_column("aim_position") == "above").fill_null(False).to_numpy(),
            draws.get_column("unit").replace_strict(UNIT_TYPES, default="ward").is_in(HIGH_FLOW_UNIT_TYPES).to_numpy(),
        )
        moved = device != draws.get_column("device_idx").to_numpy()
        draws = draws.with_columns(
            # a patient moved to another device leaves the old one's airway pressure behind
            pl.when(pl.Series(moved)).then(None).otherwise(pl.col("peep_cmh2o")).alias("peep_cmh2o"),
            pl.Series("device_idx", device),
            pl.Series(dev.DEVICES, dtype=pl.String).gather(device).alias("true_device"),
            pl.Series("flow", flow).fill_nan(None),
            pl.Series("fio2_set", fio2_set).fill_nan(None),
        )

    # 2. inspired oxygen
    fio2_true = dev.delivered_fio2(device, flow, fio2_set, u_breathing, u_venturi)
    fio2_charted = dev.charted_fio2(device, flow, fio2_set)

    # 3-4. acid-base and oxygenation at body temperature
    pao2_alveolar = phys.alveolar_po2_mmhg(fio2_true, paco2, pb, ph2o, rq)
    pao2 = _arterial_po2(pao2_alveolar, gradient, shunt, av_diff, hb_available, p50, t)
    target = np.where(
        np.isnan(_np(draws, "sat_target")), _np(draws, "pao2_target"), phys.hill_po2(_np(draws, "sat_target"), p50)
    )
    pao2 = np.where(np.isnan(target), pao2, np.minimum(target, pao2_alveolar - 3.0))
    efficiency = _np(draws, "oxygenator_efficiency")
    oxygenator = efficiency * (fio2_true * (pb - ph2o) - paco2)
    pao2 = np.where(np.isnan(efficiency), pao2, oxygenator)
    sat = phys.hill_saturation(pao2, p50)
    content = phys.o2_content(pao2, hb_available, p50, t)

    # 5. the pulse oximeter
    reading = phys.pulse_oximeter_reading_pct(sat, cohb, methb)
    low_sat_weight = np.clip((97.0 - 100.0 * sat) / 9.0, 0.0, 1.0)
    spo2 = reading + _np(draws, "oximeter_bias") + _np(draws, "oximeter_extra") * low_sat_weight
    over = _np(draws, "spo2_over_coox")
    spo2 = np.where(np.isnan(over), spo2, 100.0 * phys.fractional_o2hb(sat, cohb, methb) + over)
    spo2 = np.minimum(100.0, np.round(spo2))
    spo2 = np.where(draws.get_column("spo2_recorded").to_numpy(), spo2, np.nan)

    # 6. venous blood of the same patient
    pvco2 = paco2 + _np(draws, "u_venous_pco2")
    hco3_v = hco3 + 1.0
    ph_v = phys.ph_from_hco3(pvco2, hco3_v)
    p50_v = phys.p50_mmhg(p50_std, ph_v, pvco2, t)
    pvo2 = phys.po2_from_content(np.maximum(content - av_diff, 0.05), hb_available, p50_v, t)

    # 7. warmed to 37 C in the analyser
    a_po2, a_pco2, a_ph = phys.blood_at_temperature(pao2, paco2, ph, t, 37.0, hb_available, p50_std)
    v_po2, v_pco2, v_ph = phys.blood_at_temperature(pvo2, pvco2, ph_v, t, 37.0, hb_available, p50_std)
    v_po2 = np.maximum(v_po2, 22.0)
    a_hco3 = phys.hco3_from_ph(a_ph, a_pco2)
    v_hco3 = phys.hco3_from_ph(v_ph, v_pco2)
    venous = (draws.get_column("sample_type") == "venous").to_numpy()
    computed = {
        "barometric_pressure_mmhg": pb,
        "fio2_true": fio2_true,
        "fio2_charted": fio2_charted,
        "pao2_alveolar_true": pao2_alveolar,
        "pao2_true": pao2,
        "ph_true": ph,
        "sat_true": sat,
        "spo2_pct": spo2,
        "arterial_po2_37": a_po2,
        "arterial_pco2_37": a_pco2,
        "arterial_hco3_37": a_hco3,
        "venous_po2_37": v_po2,
        "venous_pco2_37": v_pco2,
        "venous_hco3_37": v_hco3,
        "blood_po2": np.where(venous, v_po2, a_po2),
        "blood_pco2": np.where(venous, v_pco2, a_pco2),
        "blood_hco3": np.where(venous, v_hco3, a_hco3),
        "blood_hb": hb,
        "blood_na": _np(draws, "na_true"),
        "blood_k": _np(draws, "k_true"),
        "blood_cl": _np(draws, "cl_true"),
        "blood_glucose": _np(draws, "glucose_true"),
        "blood_lactate": _np(draws, "lactate_true"),
        "blood_cohb": cohb,
        "blood_methb": methb,
        # analytical errors (co-oximeter SD 0.5 points clipped at 1.5; the rest small, common practice)
        "u_coox": np.clip(rng.normal(0, 0.5, n), -1.5, 1.5),
        "u_hb": rng.normal(0, 0.1, n),
        "u_na": rng.normal(0, 0.4, n),
        "u_k": rng.normal(0, 0.05, n),
        "u_cl": rng.normal(0, 0.5, n),
        "u_glucose": rng.normal(0, 0.015, n),
        "u_cohb": rng.normal(0, 0.2, n),
        "u_methb": rng.normal(0, 0.1, n),
    }
    device_missing = pl.col("device_missing")
    low_flow = pl.col("true_device").is_in(dev.LOW_FLOW_DEVICES)
    return draws.with_columns(pl.Series(k, v) for k, v in computed.items()).with_columns(
        # documentation gaps (a missing device or FiO2 is not a fault)
        pl.when(device_missing).then(None).otherwise(pl.col("true_device")).alias("o2_device"),
        pl.when(device_missing).then(None).otherwise(pl.col("flow")).alias("o2_flow_l_min"),
        # a low-flow FiO2 is only an estimate from the device and flow: without the device it is not charted
        pl.when(pl.col("fio2_missing") | (device_missing & low_flow))
        .then(None)
        .otherwise(pl.col("fio2_charted"))
        .alias("fio2"),
        pl.col("spo2_pct").fill_nan(None),
    )


def analyser_report(syringe: pl.DataFrame) -> pl.DataFrame:
    """Step 7: the analyser's reported values for the blood in each syringe (the columns ``REPORTED``).

    ``syringe`` needs the ``SYRINGE`` columns, ``p50_std``, ``sao2_is_calculated`` and the ``NOISE``
    columns; the output has the same rows in the same order.
    """
    po2 = _np(syringe, "blood_po2")
    pco2 = _np(syringe, "blood_pco2")
    hco3 = _np(syringe, "blood_hco3")
    calculated = syringe.get_column("sao2_is_calculated").to_numpy()
    ph_exact = phys.ph_from_hco3(pco2, hco3)
    rep_ph = np.round(ph_exact, 2)
    rep_pco2 = np.round(pco2, 1)
    rep_po2 = np.round(po2, 1)
    rep_hco3 = np.round(phys.hco3_from_ph(rep_ph, rep_pco2), 1)
    cohb = _np(syringe, "blood_cohb")
    methb = _np(syringe, "blood_methb")
    # the co-oximeter: oxyhaemoglobin as a fraction of total Hb, after warming to 37 C
    s37 = phys.hill_saturation(po2, phys.p50_mmhg(_np(syringe, "p50_std"), ph_exact, pco2, 37.0))
    measured = 100.0 * phys.fractional_o2hb(s37, cohb, methb) + _np(syringe, "u_coox")
    # without a co-oximeter: a standard adult curve at the reported pH and PCO2 (functional)
    standard = 100.0 * phys.hill_saturation(rep_po2, phys.p50_mmhg(phys.P50_STANDARD, rep_ph, rep_pco2, 37.0))
    sao2 = np.round(np.minimum(100.0, np.where(calculated, standard, measured)), 1)
    rep_cohb = np.where(calculated, np.nan, np.round(np.maximum(cohb + _np(syringe, "u_cohb"), 0.0), 1))
    rep_methb = np.where(calculated, np.nan, np.round(np.maximum(methb + _np(syringe, "u_methb"), 0.0), 1))
    reported = {
        "ph": rep_ph,
        "paco2_mmhg": rep_pco2,
        "pao2_mmhg": rep_po2,
        "hco3_mmol_l": rep_hco3,
        "base_excess_mmol_l": np.round(phys.standard_base_excess(rep_ph, rep_hco3), 1),
        "sao2_pct": sao2,
        "hb_g_dl": np.round(_np(syringe, "blood_hb") + _np(syringe, "u_hb"), 1),
        "na_mmol_l": np.round(_np(syringe, "blood_na") + _np(syringe, "u_na"), 0),
        "k_mmol_l": np.round(_np(syringe, "blood_k") + _np(syringe, "u_k"), 1),
        "cl_mmol_l": np.round(_np(syringe, "blood_cl") + _np(syringe, "u_cl"), 0),
        "lactate_mmol_l": np.round(_np(syringe, "blood_lactate"), 1),
        "glucose_mmol_l": np.round(_np(syringe, "blood_glucose") * (1.0 + _np(syringe, "u_glucose")), 1),
        "cohb_pct": rep_cohb,
        "methb_pct": rep_methb,
    }
    return pl.DataFrame(reported).with_columns(pl.col("cohb_pct", "methb_pct").fill_nan(None))


def assemble_records(state: pl.DataFrame, reported: pl.DataFrame) -> pl.DataFrame:
    """Canonical records (plus ``_row`` and ``source``) from the state and the analyser's report,
    which must be in the same row order."""
    return pl.concat(
        [state.select("_row", "source", *STATE_COLUMNS), reported.select(REPORTED)], how="horizontal"
    ).select("_row", "source", *CANONICAL_COLUMNS)
