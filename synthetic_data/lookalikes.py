"""Clinical look-alikes: real patients whose physiology looks odd but is not an error.

A look-alike record carries no injected fault; a data-quality flag on it is a false alarm, and
excluding it from the oxygenation statistics loses a real patient. Each kind is a group of
invented patients (every sample of such a patient belongs to the kind), drawn with the
ordinary machinery of ``hospital.py`` and then given the kind's own physiology. The second
truth file ``lookalikes.parquet`` (``sample_id``, ``lookalike_kind``, ``detail``) lists them.
Default: 1.2 % of samples per kind (about 240 records per kind in a 20 000-sample demo).

Kinds (values invented within the ranges stated; "from memory" where a number is clinical lore):

- ``transfusion``: anaemic patients (Hb 6.8-8.5 g/dL; intensive care, medical and surgical wards)
  transfused 1-3 units between two samples 2-6 h apart, Hb rising about 1 g/dL per unit (from
  memory) and staying up; sodium unchanged. 3-6 samples.
- ``sodium_correction``: hyponatraemia (Na 112-125 mmol/L) corrected at 4-9 mmol/L per 24 h (within
  the usual safe limits, from memory) over 1-3 days; Hb stable. 4-8 samples.
- ``bypass_dilution``: cardiac surgery on the Avocet unit. Before bypass Hb 12.5-14 g/dL, ventilated;
  on bypass Hb 7.5-8.5 (haemodilution by a balanced crystalloid prime, so Na and Cl barely move),
  cooled to 32-34 C, SpO2 not recorded (no pulsatile flow), oxygen from the oxygenator (device
  ``other``, FiO2 of the sweep gas 0.5-0.8; blood PO2 35-70 % of the sweep gas PO2), PaCO2 managed
  alpha-stat (about 40 mmHg at 37 C); after bypass Hb 10-11, 35.5-37 C, ventilated. 5-9 samples.
- ``hypothermia``: accidental hypothermia (emergency department, medical ward) at 32-35.5 C,
  rewarming about 0.5 C per sample, on room air or a nasal cannula at 1-4 L/min, healthy lungs
  (small shunt): a normal A-a gradient at body temperature. The analyser reports 37 C values.
- ``young_hyperventilation``: emergency patients aged 18-35 on room air with PaCO2 22-32 mmHg
  (anxiety, pain, early asthma), acute bicarbonate fall of 2 mmol/L per 10 mmHg (from memory),
  healthy lungs; a quarter wash out CO2 with R 1.0-1.1 (PaO2 about 117 mmHg with PaCO2 28 on air).
- ``oximeter_bias``: occult hypoxaemia - functional saturation 84-91.5 % (co-oximeter FO2Hb about
  82-90 %) while the pulse oximeter over-reads the co-oximeter by 4-8 points (Sjoding MW et al. 2020,
  N Engl J Med 383:2477; from memory). Respiratory and medical wards, room air or 1-2 L/min.
- ``carbon_monoxide``: emergency patients with COHb 8-30 % (falling with a half-life of about 74 min
  on a reservoir mask and about 250 min on air, from memory), on a reservoir mask at 15 L/min (70 %)
  or air; PaO2 normal to high, SpO2 high (COHb read as oxyhaemoglobin), co-oximeter FO2Hb low.
- ``ventilated_high_fio2``: intensive care, invasive ventilation on FiO2 0.80-1.00 with PEEP 8-16;
  shunt 10-36 % of cardiac output, so PaO2 about 60-450 mmHg and a large A-a gradient (50-100 mmHg
  is normal on 100 % oxygen even in healthy lungs).
- ``neonate``: the Dunlin Neonatal Unit, 0-27 days old (birth date given; age exported only by
  layouts with an age column), fetal haemoglobin (P50 18-21 mmHg, about 19.5; from memory),
  Hb 14-20 g/dL, PaO2 kept at 45-85 mmHg (neonatal targets), PaCO2 35-60, glucose 2.8-6.5 mmol/L;
  room air, high-flow (2-8 L/min), CPAP or ventilation.
- ``child``: the Puffin Paediatric Ward, 1-15 years old, Hb 10.5-14 g/dL, normal paediatric
  physiology; room air, nasal cannula 1-2 L/min, face mask or high flow.
"""

from __future__ import annotations

from datetime import date

import numpy as np

from synthetic_data import devices as dev
from synthetic_data.hospital import (
    CARDIAC_UNIT,
    NEONATAL_UNIT,
    PAEDIATRIC_UNIT,
    UNITS,
    Draws,
    Unit,
    draw_patients,
    draw_samples,
)
from synthetic_data.physics import LOG10_PCO2_PER_C, P50_FETAL

LOOKALIKE_KINDS: tuple[str, ...] = (
    "transfusion",
    "sodium_correction",
    "bypass_dilution",
    "hypothermia",
    "young_hyperventilation",
    "oximeter_bias",
    "carbon_monoxide",
    "ventilated_high_fio2",
    "neonate",
    "child",
)
DEFAULT_LOOKALIKE_RATES: dict[str, float] = dict.fromkeys(LOOKALIKE_KINDS, 0.012)
SAMPLES_PER_PATIENT: dict[str, tuple[int, int]] = {
    "transfusion": (3, 6),
    "sodium_correction": (4, 8),
    "bypass_dilution": (5, 9),
    "hypothermia": (1, 3),
    "young_hyperventilation": (1, 2),
    "oximeter_bias": (1, 4),
    "carbon_monoxide": (1, 3),
    "ventilated_high_fio2": (3, 8),
    "neonate": (2, 8),
    "child": (1, 4),
}
"""Samples per look-alike patient (uniform); a kind with fewer rows than the minimum is not drawn."""

_UNIT = {u.kind: u for u in UNITS}
ICU, ED, RESPIRATORY, MEDICAL, SURGICAL = (
    _UNIT["intensive_care"],
    _UNIT["emergency"],
    _UNIT["respiratory_ward"],
    _UNIT["medical_ward"],
    _UNIT["surgical_ward"],
)
HOST_UNITS: dict[str, tuple[tuple[Unit, float], ...]] = {
    "transfusion": ((ICU, 0.4), (MEDICAL, 0.3), (SURGICAL, 0.3)),
    "sodium_correction": ((MEDICAL, 0.6), (ICU, 0.4)),
    "bypass_dilution": ((CARDIAC_UNIT, 1.0),),
    "hypothermia": ((ED, 0.6), (MEDICAL, 0.4)),
    "young_hyperventilation": ((ED, 1.0),),
    "oximeter_bias": ((RESPIRATORY, 0.5), (MEDICAL, 0.5)),
    "carbon_monoxide": ((ED, 1.0),),
    "ventilated_high_fio2": ((ICU, 1.0),),
    "neonate": ((NEONATAL_UNIT, 1.0),),
    "child": ((PAEDIATRIC_UNIT, 1.0),),
}


def lookalike_rows(rows: int, rates: dict[str, float]) -> dict[str, int]:
    """Samples per kind: the rate times ``rows``, or 0 when fewer than one patient's minimum."""
    out: dict[str, int] = {}
    for kind, rate in rates.items():
        k = round(rate * rows)
        out[kind] = k if k >= SAMPLES_PER_PATIENT[kind][0] else 0
    return out


# --- helpers -------------------------------------------------------------------------------------------


def _within(sample_patient: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per sample: its rank within its patient, the patient's number of samples, the patient's first row."""
    n = sample_patient.size
    starts = np.flatnonzero(np.r_[True, sample_patient[1:] != sample_patient[:-1]])
    sizes = np.diff(np.r_[starts, n])
    first = np.repeat(starts, sizes)
    return np.arange(n) - first, np.repeat(sizes, sizes), first


def _times(rng: np.random.Generator, sample_patient: np.ndarray, gaps_min: np.ndarray, days: int) -> np.ndarray:
    """Collection minutes: each patient's samples ``gaps_min`` apart (the first sample's gap is
    ignored), the sequence placed at random within the ``days`` days."""
    rank, _, first = _within(sample_patient)
    cum = np.cumsum(np.where(rank == 0, 0.0, gaps_min))
    offset = cum - cum[first]
    n_pat = int(sample_patient.max()) + 1
    span = np.zeros(n_pat)
    np.maximum.at(span, sample_patient, offset)
    latest = np.maximum(days * 1440.0 - 1.0 - span, 0.0)
    start = rng.random(n_pat) * latest
    return np.minimum(np.floor(start[sample_patient] + offset), days * 1440 - 1).astype(np.int64)


def _put(draws: Draws, name: str, mask: np.ndarray, value: np.ndarray | float) -> None:
    draws[name][mask] = value if np.isscalar(value) else np.asarray(value)[mask]


def _device(
    draws: Draws,
    mask: np.ndarray,
    name: str,
    *,
    flow: np.ndarray | float = np.nan,
    fio2: np.ndarray | float = np.nan,
    peep: np.ndarray | float = np.nan,
    mean_airway: np.ndarray | float = np.nan,
) -> None:
    """Put the samples in ``mask`` on a device, documented in full."""
    draws["device_idx"][mask] = dev.DEVICES.index(name)
    _put(draws, "flow", mask, flow)
    _put(draws, "fio2_set", mask, fio2)
    _put(draws, "peep_cmh2o", mask, peep)
    _put(draws, "mean_airway_pressure_cmh2o", mask, mean_airway)
    draws["device_missing"][mask] = False
    draws["fio2_missing"][mask] = False


def _base(
    rng: np.random.Generator, kind: str, n_rows: int, start: date, days: int, sao2_calculated_share: float
) -> tuple[Draws, np.ndarray]:
    """Patients of the kind's host units drawn as ordinary patients, all samples labelled arterial."""
    hosts = HOST_UNITS[kind]
    shares = np.array([s for _, s in hosts])
    per_unit = rng.multinomial(n_rows, shares / shares.sum())
    # a host unit with fewer rows than one patient needs gives them to the largest one
    short = (per_unit > 0) & (per_unit < SAMPLES_PER_PATIENT[kind][0])
    largest = int(np.argmax(per_unit))
    moved = int(per_unit[short].sum()) - (int(per_unit[largest]) if short[largest] else 0)
    per_unit[short & (np.arange(per_unit.size) != largest)] = 0
    per_unit[largest] += moved
    patients, sample_patient = draw_patients(
        rng, [u for u, _ in hosts], per_unit, start, days, SAMPLES_PER_PATIENT[kind]
    )
    draws = draw_samples(rng, patients, sample_patient, days, sao2_calculated_share)
    draws["sample_type_idx"][:] = 0
    # one admission each (their samples are re-timed below), arterial blood from the line if there is one
    draws["admission_no"][:] = 0
    charted = draws["collection_method_idx"] >= 0
    draws["collection_method_idx"] = np.where(charted, draws["arterial_line"].astype(np.int64), -1)
    draws["lookalike_idx"][:] = LOOKALIKE_KINDS.index(kind)
    return draws, sample_patient


def _per_patient(rng: np.random.Generator, sample_patient: np.ndarray, low: float, high: float) -> np.ndarray:
    """One uniform draw per patient, repeated for each of its samples."""
    return rng.uniform(low, high, int(sample_patient.max()) + 1)[sample_patient]


def _set_age(d: Draws, sp: np.ndarray, start: date, age: np.ndarray) -> None:
    """Give each patient the age ``age`` (years, per sample, the same for a patient's samples) at its
    first sample, through its birth date."""
    _, _, first = _within(sp)
    first_day = d["collected_min"][first] // 1440
    d["birth_ordinal"] = start.toordinal() + first_day - np.round(age * 365.25).astype(np.int64)
    d["age_at_start"] = age


def _details(template: str, *columns: np.ndarray) -> np.ndarray:
    return np.array([template.format(*values) for values in zip(*columns, strict=True)], dtype=object)


# --- the kinds -----------------------------------------------------------------------------------------


def _transfusion(rng: np.random.Generator, d: Draws, sp: np.ndarray, days: int) -> None:
    rank, size, _ = _within(sp)
    n_pat = int(sp.max()) + 1
    sizes = size[np.r_[True, sp[1:] != sp[:-1]]]
    after_k = rng.integers(1, sizes)[sp]  # the first sample after the transfusion (1 .. size-1)
    units = rng.integers(1, 4, n_pat)[sp]
    rise = np.clip(units * rng.uniform(0.85, 1.15, n_pat)[sp], 1.0, 3.0)
    before = _per_patient(rng, sp, 6.8, 8.5)
    after = rank >= after_k
    d["hb_true"] = before + np.where(after, rise, 0.0) + rng.normal(0, 0.1, sp.size)
    gaps = np.where(rank == after_k, rng.uniform(120, 360, sp.size), rng.uniform(180, 600, sp.size))
    d["collected_min"] = _times(rng, sp, gaps, days)
    d["lookalike_detail"] = _details(
        "transfused {} unit(s) between samples {} and {}: Hb about {:.1f} -> {:.1f} g/dL, sodium unchanged; "
        "sample {} of {} ({} the transfusion)",
        units,
        after_k,
        after_k + 1,
        before,
        before + rise,
        rank + 1,
        size,
        np.where(after, "after", "before"),
    )


def _sodium_correction(rng: np.random.Generator, d: Draws, sp: np.ndarray, days: int) -> None:
    rank, size, _ = _within(sp)
    na0 = _per_patient(rng, sp, 112.0, 125.0)
    rate = _per_patient(rng, sp, 4.0, 9.0)
    span_min = _per_patient(rng, sp, 1.0, 3.0) * 1440.0
    gaps = span_min / np.maximum(size - 1, 1) * rng.uniform(0.7, 1.3, sp.size)
    minutes = _times(rng, sp, gaps, days)
    d["collected_min"] = minutes
    first_min = minutes[_within(sp)[2]]
    hours = (minutes - first_min) / 60.0
    na = na0 + rate * hours / 24.0 + rng.normal(0, 0.4, sp.size)
    d["cl_true"] = d["cl_true"] + (na - d["na_true"])  # chloride follows sodium
    d["na_true"] = na
    first = _within(sp)[2]
    d["hb_true"] = d["hb_true"][first] + rng.normal(0, 0.12, sp.size)  # Hb stable
    d["lookalike_detail"] = _details(
        "hyponatraemia corrected at {:.1f} mmol/L per 24 h from Na {:.0f}; sample {} of {}, {:.0f} h after the first",
        rate,
        na0,
        rank + 1,
        size,
        hours,
    )


def _bypass_dilution(rng: np.random.Generator, d: Draws, sp: np.ndarray, days: int) -> None:
    rank, size, _ = _within(sp)
    n = sp.size
    n_pat = int(sp.max()) + 1
    sizes = size[np.r_[True, sp[1:] != sp[:-1]]]
    pre = 1 + ((rng.random(n_pat) < 0.5) & (sizes >= 6))
    on = np.minimum(rng.integers(2, 5, n_pat), sizes - pre - 1)
    phase = np.where(rank < pre[sp], 0, np.where(rank < (pre + on)[sp], 1, 2))
    before, during, after = phase == 0, phase == 1, phase == 2
    starts_phase = np.r_[True, phase[1:] != phase[:-1]] & (rank > 0)
    gaps = np.where(
        before,
        rng.uniform(15, 40, n),
        np.where(
            during,
            np.where(starts_phase, rng.uniform(30, 60, n), rng.uniform(20, 40, n)),
            np.where(starts_phase, rng.uniform(120, 300, n), rng.uniform(60, 240, n)),
        ),
    )
    d["collected_min"] = _times(rng, sp, gaps, days)
    hb = np.where(
        before,
        _per_patient(rng, sp, 12.5, 14.0),
        np.where(during, _per_patient(rng, sp, 7.5, 8.5), _per_patient(rng, sp, 10.0, 11.0)),
    )
    d["hb_true"] = hb + rng.normal(0, 0.12, n)
    cooled = np.clip(_per_patient(rng, sp, 32.0, 34.0) + rng.normal(0, 0.3, n), 32.0, 34.0)
    d["temperature_c"] = np.round(
        np.where(before, rng.uniform(36.0, 36.8, n), np.where(during, cooled, rng.uniform(35.5, 37.0, n))), 1
    )
    vent_fio2 = np.round(rng.choice([0.40, 0.45, 0.50, 0.55, 0.60], n), 2)
    peep = np.where(before, 5.0, rng.choice([5.0, 6.0, 8.0], n))
    _device(d, before | after, "invasive_ventilation", fio2=vent_fio2, peep=peep, mean_airway=peep + 5.0)
    sweep = np.round(rng.choice([0.50, 0.55, 0.60, 0.65, 0.70, 0.75, 0.80], n), 2)
    _device(d, during, "other", fio2=sweep)
    d["oxygenator_efficiency"] = np.where(during, rng.uniform(0.35, 0.70, n), np.nan)
    d["spo2_recorded"] = ~during
    # alpha-stat: PaCO2 about 40 mmHg when read at 37 C, so lower in the cooled patient
    paco2_37 = np.clip(rng.normal(40.0, 3.0, n), 33.0, 47.0)
    d["paco2_true"] = np.where(
        during, paco2_37 / np.power(10.0, LOG10_PCO2_PER_C * (37.0 - d["temperature_c"])), paco2_37
    )
    d["hco3_true"] = np.clip(rng.normal(23.5, 1.5, n), 20.0, 27.0)
    d["shunt"] = rng.uniform(0.03, 0.12, n)
    d["k_true"] = np.where(during, rng.uniform(4.3, 5.5, n), d["k_true"])
    d["glucose_true"] = np.where(
        during, rng.uniform(7.0, 11.0, n), np.where(after, rng.uniform(6.0, 10.0, n), d["glucose_true"])
    )
    d["lactate_true"] = np.clip(rng.lognormal(np.log(1.4), 0.3, n), 0.6, 3.5)
    d["hypercapnic_risk"][:] = False
    label = np.where(
        before,
        "before bypass, ventilated",
        np.where(
            during,
            "on bypass: cooled, oxygen from the oxygenator (FiO2 of the sweep gas), SpO2 not recorded",
            "after bypass, ventilated",
        ),
    )
    d["lookalike_detail"] = _details(
        "cardiac surgery, {}: Hb about {:.1f} g/dL, {:.1f} C; sample {} of {}",
        label,
        hb,
        d["temperature_c"],
        rank + 1,
        size,
    )


def _hypothermia(rng: np.random.Generator, d: Draws, sp: np.ndarray, days: int) -> None:
    rank, size, _ = _within(sp)
    n = sp.size
    d["collected_min"] = _times(rng, sp, rng.uniform(60, 180, n), days)
    t = np.minimum(_per_patient(rng, sp, 32.0, 35.0) + 0.5 * rank + rng.normal(0, 0.1, n), 35.5)
    d["temperature_c"] = np.round(np.maximum(t, 32.0), 1)
    on_cannula = _per_patient(rng, sp, 0.0, 1.0) < 0.4
    _device(d, ~on_cannula, "room_air", flow=0.0)
    _device(d, on_cannula, "nasal_cannula", flow=np.round(_per_patient(rng, sp, 0.5, 4.49)))
    d["shunt"] = rng.uniform(0.003, 0.015, n)
    d["vq_factor"] = rng.uniform(0.3, 0.7, n)
    d["paco2_true"] = np.clip(rng.normal(38.0, 3.5, n), 30.0, 46.0)
    d["hco3_true"] = np.clip(rng.normal(23.5, 1.8, n), 19.0, 28.0)
    d["lactate_true"] = np.clip(rng.lognormal(np.log(1.6), 0.35, n), 0.6, 4.5)
    d["hypercapnic_risk"][:] = False
    d["lookalike_detail"] = _details(
        "hypothermic patient at {:.1f} C on {}; gases reported at 37 C; sample {} of {}",
        d["temperature_c"],
        np.where(on_cannula, "a nasal cannula", "room air"),
        rank + 1,
        size,
    )


def _young_hyperventilation(rng: np.random.Generator, d: Draws, sp: np.ndarray, start: date, days: int) -> None:
    rank, size, _ = _within(sp)
    n = sp.size
    d["collected_min"] = _times(rng, sp, rng.uniform(30, 90, n), days)
    _set_age(d, sp, start, _per_patient(rng, sp, 18.02, 35.9))
    _device(d, np.ones(n, dtype=bool), "room_air", flow=0.0)
    paco2 = rng.uniform(22.0, 32.0, n)
    d["paco2_true"] = paco2
    d["hco3_true"] = 24.5 - 0.2 * (40.0 - paco2) + rng.normal(0, 0.8, n)
    washout = rng.random(n) < 0.25
    d["rq"] = np.where(washout, rng.uniform(1.0, 1.1, n), rng.uniform(0.8, 0.95, n))
    d["shunt"] = rng.uniform(0.002, 0.012, n)
    d["vq_factor"] = rng.uniform(0.3, 0.8, n)
    d["temperature_c"] = np.round(rng.uniform(36.6, 37.4, n), 1)
    d["lactate_true"] = np.clip(rng.lognormal(np.log(1.2), 0.3, n), 0.5, 2.5)
    d["hypercapnic_risk"][:] = False
    d["lookalike_detail"] = _details(
        "hyperventilating young adult on room air: PaCO2 about {:.0f} mmHg, R {:.2f}{}; sample {} of {}",
        paco2,
        d["rq"],
        np.where(washout, " (CO2 wash-out)", ""),
        rank + 1,
        size,
    )


def _oximeter_bias(rng: np.random.Generator, d: Draws, sp: np.ndarray, days: int) -> None:
    rank, size, _ = _within(sp)
    n = sp.size
    d["collected_min"] = _times(rng, sp, rng.uniform(120, 720, n), days)
    on_cannula = _per_patient(rng, sp, 0.0, 1.0) < 0.5
    _device(d, ~on_cannula, "room_air", flow=0.0)
    _device(d, on_cannula, "nasal_cannula", flow=np.round(_per_patient(rng, sp, 0.5, 2.49)))
    d["sat_target"] = rng.uniform(0.84, 0.915, n)
    d["paco2_true"] = np.clip(rng.normal(40.0, 4.0, n), 33.0, 48.0)
    d["hco3_true"] = np.clip(rng.normal(24.5, 1.5, n), 21.0, 28.0)
    d["sao2_is_calculated"][:] = False  # the hypoxaemia is known from co-oximetry
    d["spo2_over_coox"] = rng.uniform(4.0, 8.0, n)
    d["cohb_true"] = rng.uniform(0.5, 2.0, n)
    d["lookalike_detail"] = _details(
        "occult hypoxaemia: functional saturation about {:.0f} % while the pulse oximeter over-reads the "
        "co-oximeter by {:.1f} points; sample {} of {}",
        100.0 * d["sat_target"],
        d["spo2_over_coox"],
        rank + 1,
        size,
    )


def _carbon_monoxide(rng: np.random.Generator, d: Draws, sp: np.ndarray, days: int) -> None:
    rank, size, first = _within(sp)
    n = sp.size
    on_mask = _per_patient(rng, sp, 0.0, 1.0) < 0.7
    gaps = np.where(on_mask, rng.uniform(30, 55, n), rng.uniform(60, 180, n))
    minutes = _times(rng, sp, gaps, days)
    d["collected_min"] = minutes
    _device(d, on_mask, "reservoir_mask", flow=15.0)
    _device(d, ~on_mask, "room_air", flow=0.0)
    half_life = np.where(on_mask, 74.0, 250.0)
    elapsed = (minutes - minutes[first]).astype(np.float64)
    decay = np.power(0.5, elapsed / half_life)
    n_pat = int(sp.max()) + 1
    last_decay = np.ones(n_pat)
    np.minimum.at(last_decay, sp, decay)
    lowest_start = np.maximum(8.0 / last_decay, 8.0)
    cohb0 = lowest_start + rng.random(n_pat) * np.maximum(30.0 - lowest_start, 0.0)
    d["cohb_true"] = np.minimum(cohb0[sp] * decay, 30.0)
    d["sao2_is_calculated"][:] = False  # COHb is known from co-oximetry
    d["shunt"] = rng.uniform(0.005, 0.03, n)
    d["paco2_true"] = np.clip(rng.normal(38.0, 3.5, n), 30.0, 46.0)
    d["hco3_true"] = np.clip(rng.normal(23.0, 1.5, n), 19.0, 27.0)
    d["lactate_true"] = np.clip(rng.lognormal(np.log(2.2), 0.35, n), 1.0, 6.0)
    d["temperature_c"] = np.round(rng.uniform(36.5, 37.3, n), 1)
    d["hypercapnic_risk"][:] = False
    d["lookalike_detail"] = _details(
        "carbon monoxide poisoning: COHb about {:.0f} % on {}; the pulse oximeter counts COHb as oxyhaemoglobin; "
        "sample {} of {}",
        d["cohb_true"],
        np.where(on_mask, "a reservoir mask at 15 L/min", "room air"),
        rank + 1,
        size,
    )


def _ventilated_high_fio2(rng: np.random.Generator, d: Draws, sp: np.ndarray, days: int) -> None:
    rank, size, _ = _within(sp)
    n = sp.size
    d["collected_min"] = _times(rng, sp, rng.uniform(180, 480, n), days)
    fio2 = rng.choice([0.80, 0.85, 0.90, 0.95, 1.00], n)
    peep = rng.integers(8, 17, n).astype(np.float64)
    _device(
        d,
        np.ones(n, dtype=bool),
        "invasive_ventilation",
        fio2=fio2,
        peep=peep,
        mean_airway=np.round(peep + rng.uniform(4.0, 10.0, n)),
    )
    d["shunt"] = np.clip(_per_patient(rng, sp, 0.11, 0.34) + rng.normal(0, 0.02, n), 0.10, 0.36)
    d["paco2_true"] = np.clip(rng.normal(42.0, 5.0, n), 32.0, 60.0)
    d["severity_now"] = np.maximum(d["severity_now"], 0.6)
    d["lookalike_detail"] = _details(
        "ventilated on FiO2 {:.2f} with PEEP {:.0f}: shunt about {:.0f} % of cardiac output; sample {} of {}",
        fio2,
        peep,
        100.0 * d["shunt"],
        rank + 1,
        size,
    )


def _neonate(rng: np.random.Generator, d: Draws, sp: np.ndarray, start: date, days: int) -> None:
    rank, size, first = _within(sp)
    n = sp.size
    n_pat = int(sp.max()) + 1
    age0_days = rng.integers(0, 21, n_pat)
    room_days = 27 - age0_days  # the whole stay sampled inside the neonatal period (0-27 days)
    gap_cap = room_days[sp] * 1440.0 / np.maximum(size - 1, 1)
    gaps = np.minimum(rng.uniform(240, 1440, n), gap_cap)
    minutes = _times(rng, sp, gaps, days)
    d["collected_min"] = minutes
    first_day = minutes[first] // 1440
    d["birth_ordinal"] = start.toordinal() + first_day - age0_days[sp]
    age_days = minutes // 1440 - first_day + age0_days[sp]
    p50 = np.clip(rng.normal(P50_FETAL, 0.7, n_pat), 18.0, 21.0)[sp]
    d["p50_std"] = p50
    hb = _per_patient(rng, sp, 14.0, 20.0)
    d["hb_true"] = hb + rng.normal(0, 0.2, n)
    d["temperature_c"] = np.round(rng.uniform(36.5, 37.5, n), 1)
    device = d["device_idx"]
    high_flow = device == dev.DEVICES.index("high_flow_nasal")
    d["flow"][high_flow] = rng.choice([2.0, 4.0, 6.0, 8.0], int(high_flow.sum()))
    set_fio2 = device >= len(dev.LOW_FLOW_DEVICES)
    d["fio2_set"][set_fio2] = np.round(rng.uniform(0.21, 0.45, int(set_fio2.sum())), 2)
    cpap = device == dev.DEVICES.index("cpap")
    d["peep_cmh2o"][cpap] = rng.choice([5.0, 6.0, 7.0], int(cpap.sum()))
    vent = device == dev.DEVICES.index("invasive_ventilation")
    d["peep_cmh2o"][vent] = rng.choice([4.0, 5.0, 6.0], int(vent.sum()))
    d["mean_airway_pressure_cmh2o"][vent] = d["peep_cmh2o"][vent] + rng.choice([3.0, 4.0, 5.0, 6.0], int(vent.sum()))
    d["pao2_target"] = rng.uniform(45.0, 85.0, n)
    d["paco2_true"] = np.clip(rng.normal(45.0, 5.0, n), 35.0, 60.0)
    d["hco3_true"] = np.clip(rng.normal(22.0, 2.0, n), 17.0, 27.0)
    d["lactate_true"] = np.clip(rng.lognormal(np.log(1.4), 0.3, n), 0.6, 3.0)
    d["glucose_true"] = rng.uniform(2.8, 6.5, n)
    d["k_true"] = rng.uniform(4.0, 5.8, n)
    d["cohb_true"] = rng.uniform(0.5, 2.0, n)
    d["hypercapnic_risk"][:] = False
    d["lookalike_detail"] = _details(
        "neonate {} day(s) old: fetal haemoglobin, P50 about {:.1f} mmHg, Hb about {:.1f} g/dL; sample {} of {}",
        age_days,
        p50,
        hb,
        rank + 1,
        size,
    )


def _child(rng: np.random.Generator, d: Draws, sp: np.ndarray, days: int) -> None:
    rank, size, _ = _within(sp)
    n = sp.size
    d["collected_min"] = _times(rng, sp, rng.uniform(240, 1440, n), days)
    hb = _per_patient(rng, sp, 10.5, 14.0)
    d["hb_true"] = hb + rng.normal(0, 0.2, n)
    device = d["device_idx"]
    cannula = device == dev.NASAL_CANNULA
    d["flow"][cannula] = rng.choice([1.0, 2.0], int(cannula.sum()))
    mask = device == dev.SIMPLE_MASK
    d["flow"][mask] = rng.choice([5.0, 6.0, 7.0, 8.0], int(mask.sum()))
    high_flow = device == dev.DEVICES.index("high_flow_nasal")
    d["flow"][high_flow] = rng.choice([10.0, 15.0, 20.0, 25.0], int(high_flow.sum()))
    d["fio2_set"][high_flow] = np.round(rng.choice([0.25, 0.30, 0.35, 0.40, 0.45, 0.50], int(high_flow.sum())), 2)
    d["paco2_true"] = np.clip(rng.normal(39.0, 3.0, n), 32.0, 46.0)
    d["hco3_true"] = np.clip(rng.normal(23.5, 1.5, n), 19.0, 27.0)
    d["shunt"] = rng.uniform(0.005, 0.05, n)
    d["temperature_c"] = np.round(rng.uniform(36.4, 38.5, n), 1)
    d["lactate_true"] = np.clip(rng.lognormal(np.log(1.0), 0.3, n), 0.5, 2.2)
    d["glucose_true"] = rng.uniform(4.0, 7.0, n)
    d["cohb_true"] = rng.uniform(0.5, 1.5, n)
    d["hypercapnic_risk"][:] = False
    d["lookalike_detail"] = _details(
        "child on the paediatric ward: normal paediatric physiology, Hb about {:.1f} g/dL; sample {} of {}",
        hb,
        rank + 1,
        size,
    )


def draw_lookalikes(
    rng: np.random.Generator,
    rows_per_kind: dict[str, int],
    start: date,
    days: int,
    sao2_calculated_share: float,
) -> list[Draws]:
    """The look-alike patients' draws, one ``Draws`` per kind with rows (in ``LOOKALIKE_KINDS`` order)."""
    out: list[Draws] = []
    for kind in LOOKALIKE_KINDS:
        n_rows = rows_per_kind.get(kind, 0)
        if n_rows <= 0:
            continue
        d, sp = _base(rng, kind, n_rows, start, days, sao2_calculated_share)
        if kind == "transfusion":
            _transfusion(rng, d, sp, days)
        elif kind == "sodium_correction":
            _sodium_correction(rng, d, sp, days)
        elif kind == "bypass_dilution":
            _bypass_dilution(rng, d, sp, days)
        elif kind == "hypothermia":
            _hypothermia(rng, d, sp, days)
        elif kind == "young_hyperventilation":
            _young_hyperventilation(rng, d, sp, start, days)
        elif kind == "oximeter_bias":
            _oximeter_bias(rng, d, sp, days)
        elif kind == "carbon_monoxide":
            _carbon_monoxide(rng, d, sp, days)
        elif kind == "ventilated_high_fio2":
            _ventilated_high_fio2(rng, d, sp, days)
        elif kind == "neonate":
            _neonate(rng, d, sp, start, days)
        else:
            _child(rng, d, sp, days)
        if kind not in ("neonate", "young_hyperventilation"):
            # the samples were re-timed: the patient's drawn age holds at its first sample
            _set_age(d, sp, start, d["age_at_start"])
        out.append(d)
    return out
