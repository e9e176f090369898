"""The invented Saltmarsh Valley Hospital: its units, analysers, export sources and patients.

Everything here is made up for demonstration: unit names, analyser names, patient
identifiers and every number describing the patient mix. Nothing is drawn from real
records.

This module only draws random inputs (who was sampled, where, when, on which device, with
which random physiology offsets). It does not compute any physiological formula: the
forward model (``forward_model.py``) does that in SQL with the shared macros.

All draws are vectorised with one ``numpy.random.Generator``; the only Python loops run
over units, devices or export sources (a handful each), never over records.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime

import numpy as np
import polars as pl

SITE_NAME = "Saltmarsh Valley Hospital"
SITE_ALTITUDE_M = 35.0
"""Invented altitude of the hospital; the station pressure follows from it (SQL macro)."""
WEATHER_SD_MMHG = 4.0
"""Day-to-day spread of the station pressure around its altitude value (invented)."""

SOURCES: dict[str, str] = {
    "eu_style": "POC",  # critical-care point-of-care analysers, European-style CSV
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
    "LAB-GAS-1": "us_style",
    "LAB-GAS-2": "us_style",
    "SAT-CURLEW-1": "parquet",
    "SAT-SANDPIPER-1": "parquet",
}

LOW_FLOW_DEVICES = ("room_air", "nasal_cannula", "simple_mask", "reservoir_mask")
"""Devices whose FiO2 follows from the flow (device table); the others deliver a set FiO2."""
SET_FIO2_DEVICES = (
    "venturi_mask",
    "high_flow_nasal",
    "cpap",
    "niv",
    "invasive_ventilation",
    "tracheostomy_mask",
)
DEVICES = LOW_FLOW_DEVICES + SET_FIO2_DEVICES
VENTURI_SETTINGS = (0.24, 0.28, 0.31, 0.35, 0.40, 0.50, 0.60)
"""Labelled Venturi settings (domain-methods.md §9)."""


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
    ),
    Unit(
        name="Curlew Respiratory Ward",
        kind="respiratory_ward",
        sample_share=0.18,
        samples_per_patient=4.0,
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
    ),
    Unit(
        name="Plover General Medical Ward",
        kind="medical_ward",
        sample_share=0.14,
        samples_per_patient=2.5,
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
    ),
    Unit(
        name="Sandpiper Surgical Ward",
        kind="surgical_ward",
        sample_share=0.08,
        samples_per_patient=2.0,
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
    ),
)

ANALYSERS: tuple[str, ...] = tuple(ANALYSER_SOURCE)


def _categorical(rng: np.random.Generator, groups: np.ndarray, tables: list[np.ndarray]) -> np.ndarray:
    """Draw one category per row; row i uses the probability vector ``tables[groups[i]]``.

    Loops over the (few) groups, never over rows.
    """
    u = rng.random(groups.shape[0])
    out = np.zeros(groups.shape[0], dtype=np.int64)
    for g, probs in enumerate(tables):
        idx = np.flatnonzero(groups == g)
        if idx.size:
            cum = np.cumsum(probs) / probs.sum()
            out[idx] = np.minimum(np.searchsorted(cum, u[idx], side="right"), probs.size - 1)
    return out


def _device_table(mix: dict[str, float]) -> np.ndarray:
    unknown = set(mix) - set(DEVICES)
    if unknown:
        raise ValueError(f"unknown devices in a unit mix: {sorted(unknown)}")
    return np.array([mix.get(d, 0.0) for d in DEVICES], dtype=np.float64)


def draw_patients(
    rng: np.random.Generator, rows: int, start: date, days: int
) -> tuple[pl.DataFrame, np.ndarray]:
    """Invent the patients and decide how many samples each one has.

    Returns the patient frame (one row per patient) and, per sample, the index of its
    patient (length ``rows``; samples of one patient are contiguous).
    """
    shares = np.array([u.sample_share for u in UNITS])
    per_unit = rng.multinomial(rows, shares / shares.sum())
    counts_parts: list[np.ndarray] = []
    unit_parts: list[np.ndarray] = []
    for ui, (unit, n_unit) in enumerate(zip(UNITS, per_unit, strict=True)):
        if n_unit == 0:
            continue
        p = 1.0 / unit.samples_per_patient
        counts = rng.geometric(p, size=int(n_unit * p * 1.3) + 16)
        while counts.sum() < n_unit:
            counts = np.concatenate([counts, rng.geometric(p, size=int(n_unit * p * 0.5) + 16)])
        cum = np.cumsum(counts)
        last = int(np.searchsorted(cum, n_unit))
        counts = counts[: last + 1].copy()
        counts[-1] -= int(cum[last] - n_unit)
        counts_parts.append(counts)
        unit_parts.append(np.full(counts.size, ui, dtype=np.int64))
    counts = np.concatenate(counts_parts)
    unit_idx = np.concatenate(unit_parts)
    n_pat = counts.size

    def per_unit_value(attr: str) -> np.ndarray:
        return np.array([getattr(u, attr) for u in UNITS], dtype=np.float64)[unit_idx]

    age = np.clip(rng.normal(per_unit_value("age_mean"), per_unit_value("age_sd")), 18, 98)
    hypercapnic = rng.random(n_pat) < per_unit_value("hypercapnic_share")
    beta_a = np.array([u.severity_beta[0] for u in UNITS])[unit_idx]
    beta_b = np.array([u.severity_beta[1] for u in UNITS])[unit_idx]
    severity = np.clip(rng.beta(beta_a, beta_b) + 0.08 * hypercapnic, 0.0, 0.95)
    # A share of at-risk patients actually retain CO2; their bicarbonate is compensated.
    retainer = hypercapnic & (rng.random(n_pat) < 0.7)
    chronic_paco2 = np.where(
        retainer, np.clip(rng.normal(54, 7, n_pat), 45, 75), np.clip(rng.normal(39, 3, n_pat), 32, 46)
    )
    hb = np.clip(rng.normal(per_unit_value("hb_mean"), 1.7), 6.5, 18.0)
    na = np.clip(rng.normal(139.0, 3.5, n_pat), 124, 154)
    k = np.clip(rng.normal(4.1, 0.45, n_pat), 2.9, 6.0)
    anion_gap = np.clip(rng.normal(8.0, 2.0, n_pat), 3.0, 14.0)

    lo = np.array([u.episode_days[0] for u in UNITS])[unit_idx]
    hi = np.array([u.episode_days[1] for u in UNITS])[unit_idx]
    episode = np.minimum(lo + (hi - lo) * rng.random(n_pat) ** 1.5, float(days))
    episode_start = rng.random(n_pat) * np.maximum(days - episode, 0.0)

    # Birth date: the age at the episode start, minus a random part of a year.
    start_ordinal = start.toordinal()
    birth_ordinal = (
        start_ordinal
        + episode_start.astype(np.int64)
        - np.floor(age * 365.25).astype(np.int64)
        - rng.integers(0, 365, n_pat)
    )
    ids = rng.choice(9_000_000, size=n_pat, replace=False) + 1_000_000

    patients = pl.DataFrame(
        {
            "patient_id": ids,
            "unit_idx": unit_idx,
            "birth_ordinal": birth_ordinal,
            "hypercapnic_risk": hypercapnic,
            "severity": severity,
            "chronic_paco2": chronic_paco2,
            "baseline_hb": hb,
            "baseline_na": na,
            "baseline_k": k,
            "anion_gap": anion_gap,
            "episode_start": episode_start,
            "episode_days": episode,
            "n_samples": counts,
        }
    ).with_columns(pl.format("SVH{}", pl.col("patient_id")).alias("patient_id"))
    sample_patient = np.repeat(np.arange(n_pat, dtype=np.int64), counts)
    return patients, sample_patient


def draw_samples(
    rng: np.random.Generator,
    patients: pl.DataFrame,
    sample_patient: np.ndarray,
    start: date,
    days: int,
    sao2_calculated_share: float,
) -> pl.DataFrame:
    """Per sample: unit, analyser, times, device, flow, set FiO2 and the random inputs of the
    forward model. Column meanings are listed in ``forward_model.py``."""
    n = sample_patient.size
    pat = patients[sample_patient]
    unit_idx = pat["unit_idx"].to_numpy()

    def per_unit_value(attr: str) -> np.ndarray:
        return np.array([getattr(u, attr) for u in UNITS], dtype=np.float64)[unit_idx]

    # --- when: collection day within the episode, time of day with a morning-round bump
    day_offset = pat["episode_start"].to_numpy() + rng.random(n) * pat["episode_days"].to_numpy()
    day = np.minimum(np.floor(day_offset), days - 1)
    minute_of_day = np.where(
        rng.random(n) < 0.3,
        np.clip(rng.normal(6 * 60, 60, n), 0, 1439),
        rng.random(n) * 1440,
    )
    collected_min = (day * 1440 + np.floor(minute_of_day)).astype(np.int64)
    turnaround = np.clip(
        np.round(rng.lognormal(np.log(per_unit_value("turnaround_median_min")), 0.45, n)), 2, 28
    )

    # --- where: analyser from the unit's analyser mix
    analyser_tables = [np.array([u.analysers.get(a, 0.0) for a in ANALYSERS]) for u in UNITS]
    analyser_idx = _categorical(rng, unit_idx, analyser_tables)

    # --- how ill right now, and which device
    severity_now = np.clip(pat["severity"].to_numpy() + rng.normal(0, 0.08, n), 0.0, 0.95)
    severe = rng.random(n) < severity_now
    groups = unit_idx * 2 + severe
    tables = [t for u in UNITS for t in (_device_table(u.mild_devices), _device_table(u.severe_devices))]
    device_idx = _categorical(rng, groups, tables)

    # --- flow and the set FiO2 (for set-FiO2 devices); the table FiO2 for low-flow devices is SQL's job
    flow = np.full(n, np.nan)
    fio2_set = np.full(n, np.nan)
    is_dev = {d: device_idx == i for i, d in enumerate(DEVICES)}
    m = is_dev["room_air"]
    flow[m] = 0.0
    m = is_dev["nasal_cannula"]
    flow[m] = rng.choice([1.0, 2.0, 2.0, 3.0, 3.0, 4.0, 4.0, 5.0, 6.0], size=int(m.sum()))
    m = is_dev["simple_mask"]
    flow[m] = rng.integers(5, 11, size=int(m.sum())).astype(np.float64)
    m = is_dev["reservoir_mask"]
    flow[m] = rng.integers(10, 16, size=int(m.sum())).astype(np.float64)
    # Venturi and tracheostomy (humidified Venturi) masks: a labelled setting; the flow printed for it
    # comes from the device table in SQL, a fifth of them run at 1.5 times that flow.
    m = is_dev["venturi_mask"]
    hypercapnic = pat["hypercapnic_risk"].to_numpy()
    setting = np.where(
        hypercapnic[m],
        rng.choice([0, 1, 1, 1, 2], size=int(m.sum())),
        rng.choice([1, 2, 3, 4, 5, 6], size=int(m.sum())),
    )
    fio2_set[m] = np.array(VENTURI_SETTINGS)[setting]
    m = is_dev["tracheostomy_mask"]
    fio2_set[m] = rng.choice([0.28, 0.35, 0.40], size=int(m.sum()))
    flow_factor = np.where(rng.random(n) < 0.2, 1.5, 1.0)
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
    mean_airway[ventilated] = np.round(
        peep[ventilated] + np.clip(rng.normal(6, 2, int(ventilated.sum())), 2, 14)
    )

    # --- documentation gaps (clean records may lack FiO2 or device; they are not faults)
    charted_from_table = np.isin(device_idx, [DEVICES.index(d) for d in LOW_FLOW_DEVICES[1:]])
    fio2_missing = charted_from_table & (rng.random(n) < per_unit_value("fio2_missing_share"))
    device_missing = rng.random(n) < per_unit_value("device_missing_share")

    # --- labelled specimen type (correctly labelled venous samples are clean)
    labelled_venous = rng.random(n) < per_unit_value("venous_share")
    sample_type_idx = labelled_venous.astype(np.int64)  # 0 arterial, 1 venous
    sample_type_idx[rng.random(n) < 0.003] = 2  # label missing: unknown

    # --- acid-base inputs: PaCO2 around the patient's chronic value, bicarbonate compensated
    chronic = pat["chronic_paco2"].to_numpy()
    acute = rng.normal(0, 4.5, n) + np.where(rng.random(n) < 0.08, rng.normal(-8, 3, n), 0.0)
    acute = acute + np.where(rng.random(n) < 0.05 + 0.1 * severity_now, rng.normal(12, 6, n), 0.0)
    paco2 = chronic + acute
    # ventilated patients are held nearer a normal PaCO2
    paco2 = np.where(ventilated, 0.5 * paco2 + 0.5 * rng.normal(41, 4, n), paco2)
    paco2 = np.clip(paco2, 24, 92)
    lactate = np.clip(
        rng.lognormal(np.log(per_unit_value("lactate_median")) + 0.7 * severity_now**2, 0.45), 0.4, 14
    )
    hco3 = 24.5 + 0.35 * (chronic - 40.0) - 0.7 * (lactate - 1.0) + rng.normal(0, 1.6, n)
    hco3 = np.clip(hco3, 12.0, 40.0)

    temperature = np.clip(
        np.round(rng.normal(37.0 + 0.4 * severity_now, 0.45 + 0.3 * severity_now), 1), 35.0, 40.5
    )

    unit_names = pl.Series([u.name for u in UNITS], dtype=pl.String)
    frame = pl.DataFrame(
        {
            "_row": np.arange(n, dtype=np.int64),
            "patient_idx": sample_patient,
            "unit": unit_names.gather(unit_idx),
            "analyser_id": pl.Series(ANALYSERS, dtype=pl.String).gather(analyser_idx),
            "collected_min": collected_min,
            "turnaround_min": turnaround.astype(np.int64),
            "day": day.astype(np.int64),
            "sample_type": pl.Series(["arterial", "venous", "unknown"], dtype=pl.String).gather(
                sample_type_idx
            ),
            "true_device": pl.Series(DEVICES, dtype=pl.String).gather(device_idx),
            "device_missing": device_missing,
            "flow": flow,
            "flow_factor": flow_factor,
            "fio2_set": fio2_set,
            "fio2_missing": fio2_missing,
            "peep_cmh2o": peep,
            "mean_airway_pressure_cmh2o": mean_airway,
            "temperature_c": temperature,
            "paco2_true": paco2,
            "hco3_true": hco3,
            "lactate_true": lactate,
            "severity_now": severity_now,
            # random inputs of the forward model (see forward_model.py)
            "u_fio2": rng.normal(0, 1, n),
            "u_aa": 0.3 + 0.7 * rng.random(n),
            "u_shunt": 0.5 + 0.6 * rng.random(n),
            "u_venous_po2": np.clip(rng.normal(38, 6, n), 22, 55),
            "u_venous_pco2": np.clip(rng.normal(5.5, 1.5, n), 2.0, 10.0),
            "u_coox": np.clip(rng.normal(0, 0.7, n), -2.0, 2.0),
            "u_spo2": np.clip(rng.normal(0.5, 1.5, n), -3.5, 4.0),
            "u_hb": rng.normal(0, 0.25, n),
            "u_na": rng.normal(0, 0.8, n),
            "u_k": rng.normal(0, 0.2, n),
            "sao2_is_calculated": rng.random(n) < sao2_calculated_share,
        }
    )
    start_dt = datetime.combine(start, datetime.min.time())
    unix_epoch_ordinal = date(1970, 1, 1).toordinal()
    collected = pl.lit(start_dt) + pl.duration(minutes=pl.col("collected_min"))
    birth = pl.col("birth_date")
    frame = (
        frame.hstack(
            pat.select(
                "patient_id",
                "hypercapnic_risk",
                "baseline_hb",
                "baseline_na",
                "baseline_k",
                "anion_gap",
                (pl.col("birth_ordinal") - unix_epoch_ordinal)
                .cast(pl.Int32)
                .cast(pl.Date)
                .alias("birth_date"),
            )
        )
        .with_columns(
            # NaN marks "not applicable" in the numpy draws; the record wants NULL
            pl.col("flow", "fio2_set", "peep_cmh2o", "mean_airway_pressure_cmh2o").fill_nan(None),
            collected.alias("collected_at"),
            (collected + pl.duration(minutes=pl.col("turnaround_min"))).alias("resulted_at"),
        )
        .with_columns(
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
        )
    )
    return frame.drop("collected_min")


def weather_by_day(rng: np.random.Generator, days: int) -> pl.DataFrame:
    """Daily offset of the station pressure from its altitude value (mmHg), one row per day."""
    extra = days + 8  # re-sent exports may land a few days after the last collection day
    offset = np.clip(rng.normal(0.0, WEATHER_SD_MMHG, extra), -3 * WEATHER_SD_MMHG, 3 * WEATHER_SD_MMHG)
    return pl.DataFrame({"day": np.arange(extra, dtype=np.int64), "pb_offset": offset})
