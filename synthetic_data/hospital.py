"""The invented Saltmarsh Valley Hospital: its units, analysers, export sources and patients.

Everything here is made up for demonstration: unit names, analyser names, patient
identifiers and every number describing the patient mix. Nothing is drawn from real
records.

This module draws the random inputs of the forward model: who was sampled, where, when, on
which device, and the patient's true state at body temperature (PaCO2, bicarbonate, lactate,
Hb, electrolytes, glucose, carboxy- and methaemoglobin, the P50 of their blood, the shunt and
gradient of their lungs, the error of their pulse oximeter). The forward model
(``forward_model.py``) turns that into what the analyser reports, with the physics of
``physics.py`` and the device table of ``devices.py``.

Draws are returned as a ``Draws`` mapping (column name -> numpy array, one entry per sample),
so that the look-alike patients (``lookalikes.py``) can be drawn with the same machinery and
then have their own columns overwritten. All draws are vectorised with one
``numpy.random.Generator``; the only Python loops run over units, devices or export sources
(a handful each), never over records.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, datetime

import numpy as np
import numpy.typing as npt
import polars as pl

from synthetic_data import devices as dev
from synthetic_data.physics import P50_SD_BETWEEN_PATIENTS, P50_STANDARD

Draws = dict[str, np.ndarray]
"""Column name -> one numpy array per sample (all the same length)."""

SITE_NAME = "Saltmarsh Valley Hospital"
SITE_ALTITUDE_M = 35.0
"""Invented altitude of the hospital; the station pressure follows from it (``physics.standard_pressure_mmhg``)."""
WEATHER_SD_MMHG = 4.0
"""Day-to-day spread of the station pressure around its altitude value (invented)."""

SOURCES: dict[str, str] = {
    "eu_style": "POC",  # critical-care point-of-care co-oximeters, European-style CSV
    "us_style": "LAB",  # main laboratory analysers, US-style CSV
    "parquet": "WH",  # ward satellite analysers, data-warehouse Parquet feed
}
"""Export source -> sample_id prefix. Each analyser belongs to one source."""

PROFILE_FILES: dict[str, str] = {
    "eu_style": "demo_eu_style.toml",
    "us_style": "demo_us_style.toml",
    "parquet": "demo_parquet.toml",
}

ANALYSER_SOURCE: dict[str, str] = {
    "POC-HERON-1": "eu_style",
    "POC-HERON-2": "eu_style",
    "POC-HERON-3": "eu_style",
    "POC-KESTREL-1": "eu_style",
    "POC-KESTREL-2": "eu_style",
    "POC-AVOCET-1": "eu_style",
    "POC-DUNLIN-1": "eu_style",
    "LAB-GAS-1": "us_style",
    "LAB-GAS-2": "us_style",
    "SAT-CURLEW-1": "parquet",
    "SAT-SANDPIPER-1": "parquet",
}
ANALYSERS: tuple[str, ...] = tuple(ANALYSER_SOURCE)

SAMPLE_TYPES = ("arterial", "venous", "unknown")
"""Sample-type labels the generator writes (index = ``sample_type_idx``)."""
COLLECTION_METHODS = (
    "arterial_puncture",
    "arterial_line",
    "capillary",
    "venous_puncture",
    "central_venous_line",
    "unknown",
)
"""How the blood was drawn, as the contract's code list (index = ``collection_method_idx``)."""
COLLECTION_METHOD_MISSING_SHARE = 0.03
"""Share of samples whose collection method is not charted (invented)."""
READMISSION_MIN_DAYS = 6.0
"""A second admission needs a stay long enough for a discharge and a return (invented)."""


@dataclass(frozen=True)
class Unit:
    """One invented hospital unit and its patient and device mix."""

    name: str
    kind: str
    sample_share: float
    samples_per_patient: float
    episode_days: tuple[float, float]
    age_mean: float
    age_sd: float
    hypercapnic_share: float
    severity_beta: tuple[float, float]
    hb_mean: float
    lactate_median: float
    venous_share: float
    fio2_missing_share: float
    device_missing_share: float
    turnaround_median_min: float
    analysers: dict[str, float]
    mild_devices: dict[str, float]
    severe_devices: dict[str, float]
    ventilated_paco2: bool = False
    age_range: tuple[float, float] = (18.02, 98.0)
    unit_type: str = "ward"
    """The kind of unit the audit compares it with (the site configuration's ``[unit_types]``)."""
    readmission_share: float = 0.0
    """Share of patients with a stay of at least ``READMISSION_MIN_DAYS`` admitted twice (invented)."""
    arterial_line_share: float = 0.0
    """Share of patients with an arterial line for their stay: their arterial samples come from it (invented)."""
    staff: int = 20
    """Staff who take and run blood gases on the unit (invented pool size)."""


UNITS: tuple[Unit, ...] = (
    Unit(
        name="Heron ICU",
        kind="intensive_care",
        sample_share=0.40,
        samples_per_patient=11.0,
        episode_days=(1.0, 21.0),
        age_mean=62,
        age_sd=15,
        hypercapnic_share=0.18,
        severity_beta=(3.0, 3.0),
        hb_mean=10.6,
        lactate_median=1.6,
        venous_share=0.02,
        fio2_missing_share=0.01,
        device_missing_share=0.003,
        turnaround_median_min=4.0,
        analysers={"POC-HERON-1": 0.4, "POC-HERON-2": 0.4, "POC-HERON-3": 0.2},
        mild_devices={
            "high_flow_nasal": 0.25,
            "nasal_cannula": 0.25,
            "venturi_mask": 0.10,
            "cpap": 0.10,
            "tracheostomy_mask": 0.10,
            "invasive_ventilation": 0.15,
            "room_air": 0.05,
        },
        severe_devices={
            "invasive_ventilation": 0.62,
            "niv": 0.12,
            "high_flow_nasal": 0.16,
            "cpap": 0.05,
            "reservoir_mask": 0.05,
        },
        ventilated_paco2=True,
        unit_type="critical_care",
        readmission_share=0.03,
        arterial_line_share=0.85,
        staff=48,
    ),
    Unit(
        name="Kestrel Emergency Department",
        kind="emergency",
        sample_share=0.20,
        samples_per_patient=1.6,
        episode_days=(0.02, 0.4),
        age_mean=58,
        age_sd=20,
        hypercapnic_share=0.15,
        severity_beta=(1.6, 3.5),
        hb_mean=13.0,
        lactate_median=1.8,
        venous_share=0.08,
        fio2_missing_share=0.10,
        device_missing_share=0.02,
        turnaround_median_min=4.0,
        analysers={"POC-KESTREL-1": 0.5, "POC-KESTREL-2": 0.5},
        mild_devices={"room_air": 0.55, "nasal_cannula": 0.30, "simple_mask": 0.10, "venturi_mask": 0.05},
        severe_devices={
            "reservoir_mask": 0.35,
            "simple_mask": 0.15,
            "niv": 0.15,
            "high_flow_nasal": 0.10,
            "venturi_mask": 0.10,
            "nasal_cannula": 0.10,
            "invasive_ventilation": 0.05,
        },
        unit_type="emergency",
        readmission_share=0.04,
        arterial_line_share=0.03,
        staff=36,
    ),
    Unit(
        name="Curlew Respiratory Ward",
        kind="respiratory_ward",
        sample_share=0.18,
        samples_per_patient=3.0,
        episode_days=(2.0, 42.0),
        age_mean=70,
        age_sd=11,
        hypercapnic_share=0.45,
        severity_beta=(2.2, 3.0),
        hb_mean=12.8,
        lactate_median=1.1,
        venous_share=0.02,
        fio2_missing_share=0.08,
        device_missing_share=0.02,
        turnaround_median_min=11.0,
        analysers={"LAB-GAS-1": 0.3, "LAB-GAS-2": 0.2, "SAT-CURLEW-1": 0.5},
        mild_devices={"room_air": 0.35, "nasal_cannula": 0.40, "venturi_mask": 0.25},
        severe_devices={
            "venturi_mask": 0.35,
            "niv": 0.30,
            "high_flow_nasal": 0.15,
            "nasal_cannula": 0.15,
            "simple_mask": 0.05,
        },
        unit_type="ward",
        readmission_share=0.18,
        arterial_line_share=0.0,
        staff=22,
    ),
    Unit(
        name="Plover General Medical Ward",
        kind="medical_ward",
        sample_share=0.14,
        samples_per_patient=2.0,
        episode_days=(1.0, 21.0),
        age_mean=72,
        age_sd=14,
        hypercapnic_share=0.15,
        severity_beta=(1.5, 4.0),
        hb_mean=12.2,
        lactate_median=1.2,
        venous_share=0.03,
        fio2_missing_share=0.15,
        device_missing_share=0.04,
        turnaround_median_min=12.0,
        analysers={"LAB-GAS-1": 0.5, "LAB-GAS-2": 0.5},
        mild_devices={"room_air": 0.55, "nasal_cannula": 0.40, "venturi_mask": 0.05},
        severe_devices={
            "nasal_cannula": 0.40,
            "simple_mask": 0.25,
            "venturi_mask": 0.20,
            "reservoir_mask": 0.15,
        },
        unit_type="ward",
        readmission_share=0.1,
        arterial_line_share=0.0,
        staff=24,
    ),
    Unit(
        name="Sandpiper Surgical Ward",
        kind="surgical_ward",
        sample_share=0.08,
        samples_per_patient=1.6,
        episode_days=(1.0, 14.0),
        age_mean=64,
        age_sd=15,
        hypercapnic_share=0.06,
        severity_beta=(1.3, 5.0),
        hb_mean=11.4,
        lactate_median=1.3,
        venous_share=0.03,
        fio2_missing_share=0.12,
        device_missing_share=0.03,
        turnaround_median_min=12.0,
        analysers={"LAB-GAS-1": 0.35, "LAB-GAS-2": 0.35, "SAT-SANDPIPER-1": 0.30},
        mild_devices={"room_air": 0.50, "nasal_cannula": 0.40, "simple_mask": 0.10},
        severe_devices={
            "nasal_cannula": 0.35,
            "simple_mask": 0.30,
            "tracheostomy_mask": 0.15,
            "reservoir_mask": 0.20,
        },
        unit_type="ward",
        readmission_share=0.05,
        arterial_line_share=0.02,
        staff=20,
    ),
)
"""The units whose patients make up the ordinary (non-look-alike) records, by ``sample_share``."""

CARDIAC_UNIT = Unit(
    name="Avocet Cardiac Theatre and Recovery",
    kind="cardiac_surgery",
    sample_share=0.0,
    samples_per_patient=7.0,
    episode_days=(0.3, 0.6),
    age_mean=66,
    age_sd=10,
    hypercapnic_share=0.05,
    severity_beta=(1.5, 6.0),
    hb_mean=13.2,
    lactate_median=1.4,
    venous_share=0.0,
    fio2_missing_share=0.0,
    device_missing_share=0.0,
    turnaround_median_min=3.0,
    analysers={"POC-AVOCET-1": 1.0},
    mild_devices={"invasive_ventilation": 1.0},
    severe_devices={"invasive_ventilation": 1.0},
    ventilated_paco2=True,
    unit_type="critical_care",
    readmission_share=0.0,
    arterial_line_share=1.0,
    staff=16,
)
NEONATAL_UNIT = Unit(
    name="Dunlin Neonatal Unit",
    kind="neonatal",
    sample_share=0.0,
    samples_per_patient=5.0,
    episode_days=(1.0, 14.0),
    age_mean=0.02,
    age_sd=0.015,
    hypercapnic_share=0.0,
    severity_beta=(1.5, 4.0),
    hb_mean=16.5,
    lactate_median=1.5,
    venous_share=0.0,
    fio2_missing_share=0.0,
    device_missing_share=0.01,
    turnaround_median_min=3.0,
    analysers={"POC-DUNLIN-1": 1.0},
    mild_devices={"room_air": 0.40, "high_flow_nasal": 0.30, "cpap": 0.30},
    severe_devices={"cpap": 0.40, "invasive_ventilation": 0.40, "high_flow_nasal": 0.20},
    age_range=(0.0, 20.0 / 365.25),
    unit_type="neonatal",
    readmission_share=0.0,
    arterial_line_share=0.6,
    staff=18,
)
PAEDIATRIC_UNIT = Unit(
    name="Puffin Paediatric Ward",
    kind="paediatric_ward",
    sample_share=0.0,
    samples_per_patient=2.0,
    episode_days=(1.0, 6.0),
    age_mean=7.0,
    age_sd=4.0,
    hypercapnic_share=0.0,
    severity_beta=(1.2, 6.0),
    hb_mean=12.2,
    lactate_median=1.1,
    venous_share=0.0,
    fio2_missing_share=0.05,
    device_missing_share=0.02,
    turnaround_median_min=11.0,
    analysers={"LAB-GAS-1": 0.5, "LAB-GAS-2": 0.5},
    mild_devices={"room_air": 0.70, "nasal_cannula": 0.20, "simple_mask": 0.10},
    severe_devices={"nasal_cannula": 0.40, "high_flow_nasal": 0.35, "simple_mask": 0.25},
    age_range=(1.02, 15.9),
    unit_type="paediatric",
    readmission_share=0.04,
    arterial_line_share=0.0,
    staff=16,
)
ALL_UNITS: tuple[Unit, ...] = (*UNITS, CARDIAC_UNIT, NEONATAL_UNIT, PAEDIATRIC_UNIT)
"""Every unit of the hospital; ``unit_idx`` in the draws indexes this tuple."""
UNIT_TYPES: dict[str, str] = {u.name: u.unit_type for u in ALL_UNITS}
"""Unit name -> unit type: the demo site configuration's ``[unit_types]`` is written from this."""
STAFF_OFFSET = np.cumsum([0, *(u.staff for u in ALL_UNITS)])[:-1]
"""First staff number of each unit: staff are numbered across the hospital, unit by unit."""
N_STAFF = sum(u.staff for u in ALL_UNITS)


def unit_index(unit: Unit) -> int:
    return ALL_UNITS.index(unit)


def _categorical(rng: np.random.Generator, groups: np.ndarray, tables: list[np.ndarray]) -> np.ndarray:
    """Draw one category per row; row i uses the probability vector ``tables[groups[i]]``.

    Loops over the (few) groups, never over rows.
    """
    u = rng.random(groups.shape[0])
    out = np.zeros(groups.shape[0], dtype=np.int64)
    for g, probs in enumerate(tables):
        idx = np.flatnonzero(groups == g)
        if idx.size and probs.sum() > 0:
            cum = np.cumsum(probs) / probs.sum()
            out[idx] = np.minimum(np.searchsorted(cum, u[idx], side="right"), probs.size - 1)
    return out


def _device_table(mix: dict[str, float]) -> np.ndarray:
    unknown = set(mix) - set(dev.DEVICES)
    if unknown:
        raise ValueError(f"unknown devices in a unit mix: {sorted(unknown)}")
    return np.array([mix.get(d, 0.0) for d in dev.DEVICES], dtype=np.float64)


def _split_counts(
    rng: np.random.Generator, n_rows: int, mean: float, counts_range: tuple[int, int] | None
) -> np.ndarray:
    """Samples per patient adding up to ``n_rows``: geometric with the given mean, or uniform in
    ``counts_range`` (a short last patient is merged into the one before)."""
    if n_rows <= 0:
        return np.zeros(0, dtype=np.int64)
    if counts_range is None:
        p = 1.0 / mean
        counts = rng.geometric(p, size=int(n_rows * p * 1.3) + 16)
        while counts.sum() < n_rows:
            counts = np.concatenate([counts, rng.geometric(p, size=int(n_rows * p * 0.5) + 16)])
    else:
        lo, hi = counts_range
        counts = rng.integers(lo, hi + 1, size=n_rows // lo + 2)
    cum = np.cumsum(counts)
    last = int(np.searchsorted(cum, n_rows))
    counts = counts[: last + 1].copy()
    counts[-1] -= int(cum[last] - n_rows)
    if counts_range is not None and counts.size > 1 and counts[-1] < counts_range[0]:
        counts[-2] += counts[-1]
        counts = counts[:-1]
    return counts.astype(np.int64)


def draw_patients(
    rng: np.random.Generator,
    units: Sequence[Unit],
    rows_per_unit: Sequence[int],
    start: date,
    days: int,
    counts_range: tuple[int, int] | None = None,
) -> tuple[Draws, np.ndarray]:
    """Invent the patients of the given units and decide how many samples each one has.

    Returns the patient draws (one entry per patient) and, per sample, the index of its
    patient (length ``sum(rows_per_unit)``; samples of one patient are contiguous).
    """
    counts_parts: list[np.ndarray] = []
    unit_parts: list[np.ndarray] = []
    for unit, n_unit in zip(units, rows_per_unit, strict=True):
        counts = _split_counts(rng, int(n_unit), unit.samples_per_patient, counts_range)
        counts_parts.append(counts)
        unit_parts.append(np.full(counts.size, unit_index(unit), dtype=np.int64))
    counts = np.concatenate(counts_parts) if counts_parts else np.zeros(0, dtype=np.int64)
    unit_idx = np.concatenate(unit_parts) if unit_parts else np.zeros(0, dtype=np.int64)
    n_pat = counts.size

    def per_unit_value(attr: str) -> np.ndarray:
        return np.array([getattr(u, attr) for u in ALL_UNITS], dtype=np.float64)[unit_idx]

    age_lo = np.array([u.age_range[0] for u in ALL_UNITS])[unit_idx]
    age_hi = np.array([u.age_range[1] for u in ALL_UNITS])[unit_idx]
    age = np.clip(rng.normal(per_unit_value("age_mean"), per_unit_value("age_sd")), age_lo, age_hi)
    adult = age >= 18.0
    hypercapnic = rng.random(n_pat) < per_unit_value("hypercapnic_share")
    beta_a = np.array([u.severity_beta[0] for u in ALL_UNITS])[unit_idx]
    beta_b = np.array([u.severity_beta[1] for u in ALL_UNITS])[unit_idx]
    severity = np.clip(rng.beta(beta_a, beta_b) + 0.08 * hypercapnic, 0.0, 0.95)
    # A share of at-risk patients actually retain CO2; their bicarbonate is compensated.
    retainer = hypercapnic & (rng.random(n_pat) < 0.7)
    chronic_paco2 = np.where(
        retainer, np.clip(rng.normal(54, 7, n_pat), 45, 75), np.clip(rng.normal(39, 3, n_pat), 32, 46)
    )
    hb = np.clip(rng.normal(per_unit_value("hb_mean"), 1.7), 6.5, 18.0)
    na = np.clip(rng.normal(139.0, 3.0, n_pat), 128, 150)
    k = np.clip(rng.normal(4.1, 0.4, n_pat), 3.0, 5.8)
    anion_gap = np.clip(rng.normal(8.0, 2.0, n_pat), 3.0, 14.0)
    # the patient's own metabolic bicarbonate offset (chloride mirrors it; it stays within a patient)
    hco3_offset = np.clip(rng.normal(0.0, 1.4, n_pat), -4.0, 4.0)
    # glucose: a fifth of adults diabetic (invented mix); typical 4-12 mmol/L
    diabetic = adult & (rng.random(n_pat) < 0.2)
    glucose = np.where(diabetic, rng.lognormal(np.log(9.0), 0.25, n_pat), rng.lognormal(np.log(6.0), 0.15, n_pat))
    glucose = np.clip(glucose, 3.8, 20.0)
    # carboxyhaemoglobin 0.5-2 %, smokers 3-8 %; methaemoglobin 0.3-1.2 % (from memory)
    smoker = adult & (rng.random(n_pat) < 0.15)
    cohb = np.where(smoker, rng.uniform(3.0, 8.0, n_pat), rng.uniform(0.5, 2.0, n_pat))
    methb = rng.uniform(0.3, 1.2, n_pat)
    # standard P50 of each patient's blood (2,3-DPG, anaemia, transfusion; SD from memory)
    p50 = np.clip(rng.normal(P50_STANDARD, P50_SD_BETWEEN_PATIENTS, n_pat), 22.5, 31.0)
    # pulse oximeter error: most read about 0.5 points high; a fifth of patients (darker skin
    # pigmentation) over-read by a further 2-4 points at low saturations - occult hypoxaemia
    # (Sjoding MW et al. 2020, N Engl J Med 383:2477; from memory)
    oximeter_base = np.clip(rng.normal(0.5, 0.6, n_pat), -1.0, 2.0)
    pigmented = rng.random(n_pat) < 0.2
    oximeter_extra = np.where(pigmented, rng.uniform(2.0, 4.0, n_pat), 0.0)

    lo = np.array([u.episode_days[0] for u in ALL_UNITS])[unit_idx]
    hi = np.array([u.episode_days[1] for u in ALL_UNITS])[unit_idx]
    episode = np.minimum(lo + (hi - lo) * rng.random(n_pat) ** 1.5, float(days))
    # a patient with a long enough window and at least two samples may have been discharged and come back
    readmitted = (
        (rng.random(n_pat) < per_unit_value("readmission_share")) & (episode >= READMISSION_MIN_DAYS) & (counts >= 2)
    )
    arterial_line = rng.random(n_pat) < per_unit_value("arterial_line_share")
    episode_start = rng.random(n_pat) * np.maximum(days - episode, 0.0)
    # birth date: the (continuous) age before the episode start
    birth_ordinal = (
        start.toordinal() + np.floor(episode_start).astype(np.int64) - np.round(age * 365.25).astype(np.int64)
    )
    patients: Draws = {
        "unit_idx": unit_idx,
        "age": age,
        "birth_ordinal": birth_ordinal,
        "hypercapnic_risk": hypercapnic,
        "severity": severity,
        "chronic_paco2": chronic_paco2,
        "baseline_hb": hb,
        "baseline_na": na,
        "baseline_k": k,
        "anion_gap": anion_gap,
        "hco3_offset": hco3_offset,
        "glucose": glucose,
        "cohb": cohb,
        "methb": methb,
        "p50_std": p50,
        "oximeter_base": oximeter_base,
        "oximeter_extra": oximeter_extra,
        "pigmented": pigmented,
        "episode_start": episode_start,
        "episode_days": episode,
        "readmitted": readmitted,
        "arterial_line": arterial_line,
        "n_samples": counts,
    }
    return patients, np.repeat(np.arange(n_pat, dtype=np.int64), counts)


def draw_samples(
    rng: np.random.Generator,
    patients: Draws,
    sample_patient: np.ndarray,
    days: int,
    sao2_calculated_share: float,
) -> Draws:
    """Per sample: unit, analyser, times, device, flow, set FiO2 and the patient's true state.

    The true state is at the patient's temperature: ``paco2_true``, ``hco3_true``, ``lactate_true``,
    ``hb_true``, ``na_true``, ``cl_true``, ``k_true``, ``glucose_true``, ``cohb_true``, ``methb_true`` (percent),
    and the lungs: respiratory exchange ratio ``rq`` (0.75-0.95), ``shunt`` (venous admixture, a
    fraction of cardiac output), ``vq_factor`` (times 1 + 0.12 x age: mmHg lost between alveolus and end-capillary
    blood), ``av_diff`` (arterial-venous oxygen content difference, mL/dL). ``pao2_target``,
    ``sat_target``, ``oxygenator_efficiency`` and ``spo2_over_coox`` are NaN here (look-alikes set them).
    """
    n = sample_patient.size

    def pat(name: str) -> np.ndarray:
        return patients[name][sample_patient]

    unit_idx = pat("unit_idx")

    def per_unit_value(attr: str) -> np.ndarray:
        return np.array([getattr(u, attr) for u in ALL_UNITS], dtype=np.float64)[unit_idx]

    # --- when: collection day within the episode, time of day with a morning-round bump. A readmitted
    # patient's window holds two admissions: the first 35 % of it, a gap, and the last 35 %.
    u_when = rng.random(n)
    readmitted = pat("readmitted")
    second_admission = readmitted & (u_when >= 0.5)
    u_when = np.where(readmitted, np.where(second_admission, 0.65 + (u_when - 0.5) * 0.7, u_when * 0.7), u_when)
    day_offset = pat("episode_start") + u_when * pat("episode_days")
    day = np.minimum(np.floor(day_offset), days - 1)
    minute_of_day = np.where(
        rng.random(n) < 0.3,
        np.clip(rng.normal(6 * 60, 60, n), 0, 1439),
        rng.random(n) * 1440,
    )
    collected_min = (day * 1440 + np.floor(minute_of_day)).astype(np.int64)
    turnaround = np.clip(np.round(rng.lognormal(np.log(per_unit_value("turnaround_median_min")), 0.45, n)), 2, 28)

    # --- where: analyser from the unit's analyser mix
    analyser_tables = [np.array([u.analysers.get(a, 0.0) for a in ANALYSERS]) for u in ALL_UNITS]
    analyser_idx = _categorical(rng, unit_idx, analyser_tables)

    # --- how ill right now, and which device
    severity_now = np.clip(pat("severity") + rng.normal(0, 0.08, n), 0.0, 0.95)
    severe = rng.random(n) < severity_now
    groups = unit_idx * 2 + severe
    tables = [t for u in ALL_UNITS for t in (_device_table(u.mild_devices), _device_table(u.severe_devices))]
    device_idx = _categorical(rng, groups, tables)

    # --- flow and the set FiO2
    flow = np.full(n, np.nan)
    fio2_set = np.full(n, np.nan)
    is_dev = {d: device_idx == i for i, d in enumerate(dev.DEVICES)}
    flow[is_dev["room_air"]] = 0.0
    m = is_dev["nasal_cannula"]
    flow[m] = rng.choice([1.0, 2.0, 2.0, 3.0, 3.0, 4.0, 4.0, 5.0, 6.0], size=int(m.sum()))
    m = is_dev["simple_mask"]
    flow[m] = rng.integers(5, 11, size=int(m.sum())).astype(np.float64)
    m = is_dev["reservoir_mask"]
    flow[m] = rng.integers(10, 16, size=int(m.sum())).astype(np.float64)
    # Venturi and tracheostomy (humidified Venturi) masks: a labelled setting at the flow printed for it,
    # a fifth of them at 1.5 times that flow
    hypercapnic = pat("hypercapnic_risk")
    m = is_dev["venturi_mask"]
    setting = np.where(
        hypercapnic[m],
        rng.choice([0, 1, 1, 1, 2], size=int(m.sum())),
        rng.choice([1, 2, 3, 4, 5, 6], size=int(m.sum())),
    )
    fio2_set[m] = np.array(dev.VENTURI_SETTINGS)[setting]
    m = is_dev["tracheostomy_mask"]
    fio2_set[m] = rng.choice([0.28, 0.35, 0.40], size=int(m.sum()))
    flow_factor = np.where(rng.random(n) < 0.2, 1.5, 1.0)
    m = is_dev["venturi_mask"] | is_dev["tracheostomy_mask"]
    flow[m] = dev.venturi_flow(fio2_set[m]) * flow_factor[m]
    m = is_dev["high_flow_nasal"]
    flow[m] = rng.choice([30.0, 40.0, 50.0, 60.0], size=int(m.sum()))
    for d, lo, hi in (
        ("high_flow_nasal", 0.25, 0.9),
        ("cpap", 0.25, 0.7),
        ("niv", 0.24, 0.6),
        ("invasive_ventilation", 0.25, 1.0),
    ):
        m = is_dev[d]
        k = int(m.sum())
        raw = lo + (hi - lo) * rng.beta(1.3, 2.5, size=k) * (0.6 + 0.4 * severity_now[m])
        fio2_set[m] = np.round(np.clip(raw / 0.05, lo / 0.05, hi / 0.05)) * 0.05
    fio2_set = np.round(fio2_set, 2)
    ventilated = is_dev["invasive_ventilation"]
    peep = np.full(n, np.nan)
    peep[ventilated] = np.round(np.clip(rng.normal(6 + 6 * severity_now[ventilated], 2), 5, 18))
    non_invasive = is_dev["cpap"] | is_dev["niv"]
    peep[non_invasive] = rng.choice([5.0, 6.0, 7.0, 8.0, 10.0], size=int(non_invasive.sum()))
    mean_airway = np.full(n, np.nan)
    mean_airway[ventilated] = np.round(peep[ventilated] + np.clip(rng.normal(6, 2, int(ventilated.sum())), 2, 14))

    # --- documentation gaps (clean records may lack FiO2 or device; they are not faults)
    low_flow_not_air = np.isin(device_idx, [dev.NASAL_CANNULA, dev.SIMPLE_MASK, dev.RESERVOIR_MASK])
    fio2_missing = low_flow_not_air & (rng.random(n) < per_unit_value("fio2_missing_share"))
    device_missing = rng.random(n) < per_unit_value("device_missing_share")

    # --- labelled specimen type (correctly labelled venous samples are clean)
    sample_type_idx = (rng.random(n) < per_unit_value("venous_share")).astype(np.int64)  # 0 arterial, 1 venous
    sample_type_idx[rng.random(n) < 0.003] = 2  # label missing: unknown

    # --- how the blood was drawn: from the patient's arterial line if there is one, else a puncture; venous
    # samples on a unit with lines half from a central line (invented); a few methods not charted
    method = np.where(pat("arterial_line"), 1, 0)
    venous_method = np.where(pat("arterial_line") & (rng.random(n) < 0.5), 4, 3)
    method = np.where(sample_type_idx == 1, venous_method, method)
    method = np.where((sample_type_idx == 2) & (rng.random(n) < 0.5), 5, method)
    method = np.where(rng.random(n) < COLLECTION_METHOD_MISSING_SHARE, -1, method)

    # --- who took it: one of the unit's staff; a few take most of the samples (invented skew)
    staff = np.array([u.staff for u in ALL_UNITS])[unit_idx]
    operator_idx = STAFF_OFFSET[unit_idx] + np.minimum(np.floor(staff * rng.random(n) ** 1.6), staff - 1).astype(
        np.int64
    )

    # --- acid-base at body temperature: PaCO2 around the patient's chronic value, bicarbonate compensated
    chronic = pat("chronic_paco2")
    acute = rng.normal(0, 4.5, n) + np.where(rng.random(n) < 0.08, rng.normal(-8, 3, n), 0.0)
    acute = acute + np.where(rng.random(n) < 0.05 + 0.1 * severity_now, rng.normal(12, 6, n), 0.0)
    paco2 = chronic + acute
    # ventilated patients are held nearer a normal PaCO2
    paco2 = np.where(ventilated, 0.5 * paco2 + 0.5 * rng.normal(41, 4, n), paco2)
    paco2 = np.clip(paco2, 24, 92)
    lactate = np.clip(rng.lognormal(np.log(per_unit_value("lactate_median")) + 0.7 * severity_now**2, 0.45), 0.4, 14)
    metabolic_hco3 = 24.5 + 0.35 * (chronic - 40.0) + pat("hco3_offset")
    hco3 = np.clip(metabolic_hco3 - 0.7 * (lactate - 1.0) + rng.normal(0, 0.8, n), 12.0, 40.0)
    na = pat("baseline_na") + rng.normal(0, 0.7, n)
    # chloride: the patient's own (sodium minus metabolic bicarbonate minus the anion gap); lactate and
    # acute changes of bicarbonate move the anion gap, not chloride
    cl = na - metabolic_hco3 - pat("anion_gap") + rng.normal(0, 0.7, n)
    temperature = np.clip(np.round(rng.normal(37.0 + 0.4 * severity_now, 0.45 + 0.3 * severity_now), 1), 35.0, 40.5)

    # --- lungs: venous admixture grows with illness; a small V/Q gradient grows with age
    shunt = rng.uniform(0.005, 0.035, n) + np.minimum(0.45, severity_now**1.5 * rng.uniform(0.25, 0.6, n))
    return {
        "patient_idx": sample_patient.astype(np.int64),
        "unit_idx": unit_idx,
        "analyser_idx": analyser_idx,
        "collected_min": collected_min,
        "admission_no": second_admission.astype(np.int64),
        "arterial_line": pat("arterial_line"),
        "collection_method_idx": method.astype(np.int64),
        "operator_idx": operator_idx,
        "turnaround_min": turnaround.astype(np.int64),
        "birth_ordinal": pat("birth_ordinal"),
        "age_at_start": pat("age"),
        "sample_type_idx": sample_type_idx,
        "device_idx": device_idx,
        "device_missing": device_missing,
        "flow": flow,
        "fio2_set": fio2_set,
        "fio2_missing": fio2_missing,
        "peep_cmh2o": peep,
        "mean_airway_pressure_cmh2o": mean_airway,
        "hypercapnic_risk": hypercapnic,
        "sao2_is_calculated": rng.random(n) < sao2_calculated_share,
        "spo2_recorded": np.ones(n, dtype=bool),
        "temperature_c": temperature,
        "paco2_true": paco2,
        "hco3_true": hco3,
        "lactate_true": lactate,
        "hb_true": pat("baseline_hb") + rng.normal(0, 0.22, n),
        "na_true": na,
        "cl_true": cl,
        "k_true": pat("baseline_k") + rng.normal(0, 0.15, n),
        "anion_gap": pat("anion_gap"),
        "glucose_true": pat("glucose") * np.exp(rng.normal(0, 0.12, n)),
        "cohb_true": np.maximum(pat("cohb") + rng.normal(0, 0.15, n), 0.2),
        "methb_true": np.maximum(pat("methb") + rng.normal(0, 0.08, n), 0.1),
        "p50_std": pat("p50_std"),
        "rq": rng.uniform(0.75, 0.95, n),
        "shunt": shunt,
        "vq_factor": rng.uniform(0.5, 1.2, n),
        "av_diff": rng.uniform(3.5, 5.5, n),
        "severity_now": severity_now,
        "pao2_target": np.full(n, np.nan),
        "sat_target": np.full(n, np.nan),
        "oxygenator_efficiency": np.full(n, np.nan),
        "oximeter_bias": pat("oximeter_base") + np.clip(rng.normal(0, 1.2, n), -3.5, 3.5),
        "oximeter_extra": pat("oximeter_extra"),
        "spo2_over_coox": np.full(n, np.nan),
        "u_breathing": rng.normal(0, 1, n),
        "u_venturi": rng.random(n),
        "u_venous_pco2": np.clip(rng.normal(5.5, 1.5, n), 2.0, 10.0),
        "lookalike_idx": np.full(n, -1, dtype=np.int64),
        "lookalike_detail": np.full(n, None, dtype=object),
    }


def concat_draws(parts: Sequence[Draws]) -> Draws:
    """Draws of several groups of patients, one after the other (patient indices made distinct)."""
    parts = [p for p in parts if p["patient_idx"].size]
    out: Draws = {}
    offset = 0
    shifted: list[Draws] = []
    for part in parts:
        shifted.append({**part, "patient_idx": part["patient_idx"] + offset})
        offset += int(part["patient_idx"].max()) + 1
    for name in parts[0]:
        out[name] = np.concatenate([p[name] for p in shifted])
    return out


def to_frame(
    draws: Draws,
    start: date,
    patient_ids: npt.NDArray[np.int64],
    encounter_ids: npt.NDArray[np.int64],
    staff_ids: npt.NDArray[np.int64],
) -> pl.DataFrame:
    """The draws as one polars frame with the label columns spelled out and the times as datetimes.

    ``patient_ids`` holds one invented 7-digit number per patient (``patient_idx``), ``encounter_ids``
    one invented 8-digit number per admission (``2 x patient_idx + admission_no``), ``staff_ids`` one
    invented 5-digit number per member of staff (``operator_idx``).
    """
    n = draws["patient_idx"].size
    plain = {
        k: v
        for k, v in draws.items()
        if k
        not in (
            "unit_idx",
            "analyser_idx",
            "sample_type_idx",
            "device_idx",
            "birth_ordinal",
            "lookalike_detail",
            "collection_method_idx",
            "operator_idx",
        )
    }
    method = draws["collection_method_idx"]
    frame = pl.DataFrame(plain).with_columns(
        pl.Series("_row", np.arange(n, dtype=np.int64)),
        pl.Series([u.name for u in ALL_UNITS], dtype=pl.String).gather(draws["unit_idx"]).alias("unit"),
        pl.Series(ANALYSERS, dtype=pl.String).gather(draws["analyser_idx"]).alias("analyser_id"),
        pl.Series(SAMPLE_TYPES, dtype=pl.String).gather(draws["sample_type_idx"]).alias("sample_type"),
        pl.Series(dev.DEVICES, dtype=pl.String).gather(draws["device_idx"]).alias("true_device"),
        pl.Series("device_idx", draws["device_idx"]),
        pl.Series("lookalike_detail", draws["lookalike_detail"].tolist(), dtype=pl.String),
        pl.Series("patient_id", patient_ids[draws["patient_idx"]]).cast(pl.String).str.pad_start(7, "0"),
        pl.Series("encounter_id", encounter_ids[2 * draws["patient_idx"] + draws["admission_no"]]).cast(pl.String),
        pl.Series("operator_id", staff_ids[draws["operator_idx"]]).cast(pl.String),
        pl.Series(COLLECTION_METHODS, dtype=pl.String)
        .gather(np.maximum(method, 0))
        .alias("collection_method")
        .set(pl.Series(method < 0), None),
        pl.Series("birth_date", draws["birth_ordinal"] - date(1970, 1, 1).toordinal()).cast(pl.Int32).cast(pl.Date),
    )
    start_dt = datetime.combine(start, datetime.min.time())
    collected = pl.lit(start_dt) + pl.duration(minutes=pl.col("collected_min"))
    birth = pl.col("birth_date")
    frame = frame.with_columns(
        pl.format("SVH{}", pl.col("patient_id")).alias("patient_id"),
        pl.format("SVA{}", pl.col("encounter_id")).alias("encounter_id"),
        pl.format("SVS{}", pl.col("operator_id")).alias("operator_id"),
        # NaN marks "not applicable" in the numpy draws; the record wants NULL
        pl.col("flow", "fio2_set", "peep_cmh2o", "mean_airway_pressure_cmh2o").fill_nan(None),
        collected.alias("collected_at"),
        (collected + pl.duration(minutes=pl.col("turnaround_min"))).alias("resulted_at"),
        (pl.col("collected_min") // 1440).alias("day"),
    ).with_columns(
        # completed years at collection
        (
            pl.col("collected_at").dt.year()
            - birth.dt.year()
            - (
                pl.col("collected_at").dt.month().cast(pl.Int32) * 100 + pl.col("collected_at").dt.day()
                < birth.dt.month().cast(pl.Int32) * 100 + birth.dt.day()
            ).cast(pl.Int32)
        )
        .cast(pl.Float64)
        .alias("age_years"),
        ((pl.col("collected_at").dt.date() - birth).dt.total_days().cast(pl.Float64) / 365.25).alias("age_exact"),
    )
    return frame.drop("collected_min")


def weather_by_day(rng: np.random.Generator, days: int) -> pl.DataFrame:
    """Daily offset of the station pressure from its altitude value (mmHg), one row per day."""
    extra = days + 8  # re-sent exports may land a few days after the last collection day
    offset = np.clip(rng.normal(0.0, WEATHER_SD_MMHG, extra), -3 * WEATHER_SD_MMHG, 3 * WEATHER_SD_MMHG)
    return pl.DataFrame({"day": np.arange(extra, dtype=np.int64), "pb_offset": offset})
