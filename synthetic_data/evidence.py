"""Physical evidence inside one record: the ways a blood gas record can contradict physics on its own.

The generator uses it to decide whether an injected fault is physically visible, and its tests
use it to show that clean records carry no such evidence. It is the generator's own judgement
with its own physics (``physics.py``, ``devices.py``); the pipeline's rules are a separate
implementation judged against it. Criteria (thresholds chosen wide enough that the between-patient
variation the generator itself draws never reaches them):

- ``pao2_above_alveolar``: labelled arterial, and PaO2 at the patient's temperature (the 37 C
  value converted with ``blood_at_temperature`` and a standard P50) above the R = 1 alveolar bound
  FiO2 (PB - PH2O(T)) - PaCO2(T) by more than max(5 mmHg, 5 %). FiO2 is the highest the documented
  device and flow can give (``devices.charting_envelope``) or, for set-FiO2 devices, the documented
  value (common practice: the bound with R = 1 cannot be exceeded in a steady state).
- ``acid_base_mismatch``: |pH - Henderson-Hasselbalch(PCO2, HCO3)| > 0.03 (common practice).
- ``sao2_off_curve``: co-oximetry functional saturation (FO2Hb / (1 - (COHb + MetHb) / 100)) more
  than 10 points from the standard adult Hill curve at the record's pH and PCO2 where the curve reads
  70-97 %, more than 15 points elsewhere.
- ``spo2_discordant``: labelled arterial, and SpO2 at least 15 points from the functional SaO2
  (measured, else read from the standard curve): beyond any documented pulse-oximeter error, whose
  over-reading in occult hypoxaemia reaches 4-8 points (Sjoding MW et al. 2020, N Engl J Med; from
  memory). A smaller gap is a real patient as often as a wrong sample.
- ``out_of_range``: PaO2 < 20 or > 700 mmHg, PaCO2 < 10 or > 200 mmHg, pH outside 6.5-7.9 (cardiac
  arrest and acute severe asthma reach pH 6.6 and PaCO2 150, from memory),
  Hb < 3 or > 25 g/dL, lactate < 0.2 or > 25 mmol/L, glucose > 50 mmol/L (plausible adult ranges,
  common practice).
"""

from __future__ import annotations

import numpy as np
import polars as pl

from synthetic_data import devices as dev
from synthetic_data import physics as phys

EVIDENCE_COLUMNS = (
    "pao2_above_alveolar",
    "acid_base_mismatch",
    "sao2_off_curve",
    "spo2_discordant",
    "out_of_range",
)
INPUT_COLUMNS = (
    "sample_id",
    "sample_type",
    "o2_device",
    "o2_flow_l_min",
    "fio2",
    "barometric_pressure_mmhg",
    "temperature_c",
    "ph",
    "paco2_mmhg",
    "pao2_mmhg",
    "hco3_mmol_l",
    "sao2_pct",
    "sao2_is_calculated",
    "spo2_pct",
    "hb_g_dl",
    "lactate_mmol_l",
    "glucose_mmol_l",
    "cohb_pct",
    "methb_pct",
)


def _f(frame: pl.DataFrame, name: str) -> np.ndarray:
    return frame.get_column(name).cast(pl.Float64).to_numpy()


def functional_sao2(sao2_pct: np.ndarray, cohb_pct: np.ndarray, methb_pct: np.ndarray) -> np.ndarray:
    """Functional saturation from a co-oximeter's FO2Hb: FO2Hb / (1 - (COHb + MetHb) / 100)
    (missing COHb or MetHb counted as 0)."""
    dys = np.nan_to_num(cohb_pct) + np.nan_to_num(methb_pct)
    return sao2_pct / (1.0 - dys / 100.0)


def fio2_upper(device: pl.Series, flow: np.ndarray, fio2: np.ndarray) -> np.ndarray:
    """The highest FiO2 the documented device and flow allow; the documented FiO2 for set devices."""
    codes = (
        device.replace_strict({d: i for i, d in enumerate(dev.DEVICES)}, default=-1, return_dtype=pl.Int64)
        .fill_null(-1)
        .to_numpy()
    )
    _, hi = dev.charting_envelope(codes, np.nan_to_num(flow, nan=6.0))
    low_flow = (codes >= 0) & (codes < len(dev.LOW_FLOW_DEVICES))
    return np.where(low_flow, np.fmax(hi, fio2), fio2)


def evidence(records: pl.DataFrame) -> pl.DataFrame:
    """Per record: ``sample_id``, the ``EVIDENCE_COLUMNS`` and ``any_evidence``."""
    r = records.select(INPUT_COLUMNS)
    t = np.nan_to_num(_f(r, "temperature_c"), nan=37.0)
    ph = _f(r, "ph")
    pco2 = _f(r, "paco2_mmhg")
    po2 = _f(r, "pao2_mmhg")
    hco3 = _f(r, "hco3_mmol_l")
    hb = _f(r, "hb_g_dl")
    cohb = _f(r, "cohb_pct")
    methb = _f(r, "methb_pct")
    arterial = (r.get_column("sample_type") == "arterial").fill_null(False).to_numpy()
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        hb_available = np.nan_to_num(hb, nan=12.0) * (1.0 - (np.nan_to_num(cohb) + np.nan_to_num(methb)) / 100.0)
        hb_available = np.clip(hb_available, 0.5, 60.0)
        safe_po2 = np.clip(np.nan_to_num(po2, nan=90.0), 1.0, 2500.0)
        safe_pco2 = np.clip(np.nan_to_num(pco2, nan=40.0), 1.0, 500.0)
        safe_ph = np.clip(np.nan_to_num(ph, nan=7.4), 6.0, 8.5)
        po2_t, pco2_t, _ = phys.blood_at_temperature(
            safe_po2, safe_pco2, safe_ph, 37.0, t, hb_available, phys.P50_STANDARD
        )
        upper = fio2_upper(r.get_column("o2_device"), _f(r, "o2_flow_l_min"), _f(r, "fio2"))
        bound = phys.alveolar_po2_mmhg(
            upper, pco2_t, _f(r, "barometric_pressure_mmhg"), phys.water_vapour_pressure_mmhg(t), 1.0
        )
        above = arterial & ~np.isnan(po2) & (po2_t > bound + np.maximum(5.0, 0.05 * bound))

        residual = ph - phys.ph_from_hco3(pco2, hco3)
        acid_base = np.abs(residual) > 0.03

        curve = 100.0 * phys.hill_saturation(po2, phys.p50_mmhg(phys.P50_STANDARD, ph, pco2, 37.0))
        measured = ~r.get_column("sao2_is_calculated").fill_null(False).to_numpy()
        functional = functional_sao2(_f(r, "sao2_pct"), cohb, methb)
        off = np.abs(functional - curve)
        steep = (curve >= 70.0) & (curve <= 97.0)
        off_curve = measured & np.where(steep, off > 10.0, off > 15.0)

        reference = np.where(measured & ~np.isnan(functional), functional, curve)
        spo2 = _f(r, "spo2_pct")
        discordant = arterial & (np.abs(spo2 - reference) >= 15.0)

        out = (
            (po2 < 20.0)
            | (po2 > 700.0)
            | (pco2 < 10.0)
            | (pco2 > 200.0)
            | (ph < 6.5)
            | (ph > 7.9)
            | (hb < 3.0)
            | (hb > 25.0)
            | (_f(r, "lactate_mmol_l") < 0.2)
            | (_f(r, "lactate_mmol_l") > 25.0)
            | (_f(r, "glucose_mmol_l") > 50.0)
        )
    flags = {
        "pao2_above_alveolar": above,
        "acid_base_mismatch": acid_base,
        "sao2_off_curve": off_curve,
        "spo2_discordant": discordant,
        "out_of_range": out,
    }
    frame = pl.DataFrame(
        {"sample_id": r.get_column("sample_id"), **{k: np.asarray(v, dtype=bool) for k, v in flags.items()}}
    )
    return frame.with_columns(pl.any_horizontal(EVIDENCE_COLUMNS).alias("any_evidence"))
