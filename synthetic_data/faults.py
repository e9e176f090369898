"""Faults injected into the demo data, and the ground truth that records them.

Each fault type has a default rate (share of all samples, ``DEFAULT_FAULT_RATES``); a sample
gets at most one fault, and look-alike patients (``lookalikes.py``) never get one. The ground
truth has one row per faulted sample: ``sample_id``, ``fault_type``, ``detail`` (what was done,
in words), ``physically_visible``, and for the writers and for evaluation ``field`` (the
canonical column hit), ``value_before`` and ``value_after`` (canonical units), ``cell_text``
(text written instead of a number) and ``resend_delay_days``.

Fault types (how each lands; all arithmetic is the generator's own, in numpy):

- ``venous_as_arterial``: the syringe holds the patient's venous blood (forward model step 6) but
  is labelled arterial (a puncture that missed the artery: never an arterial-line sample); PO2 and
  the saturation fall, PCO2 and HCO3 rise; SpO2 stays the patient's.
- ``air_contamination``: PO2 pulled 30-80 % of the way to the PO2 of room air (0.2095 x (PB -
  PH2O at 22 C), about 155 mmHg), PCO2 down by 0.4 times that share, HCO3 down 3 % of it.
- ``fio2_under_documented``: the patient is on a nasal cannula or a simple, Venturi or reservoir
  mask but the chart says room air, flow 0, FiO2 0.21.
- ``fio2_device_mismatch``: the charted FiO2 is one the charted device and flow cannot give: 0.10-0.35
  above the highest FiO2 of ``devices.charting_envelope`` (0.10-0.25 below its lowest where the
  highest is above 0.8, i.e. a reservoir mask). The patient's physiology is unchanged.
- ``ph_transcription``: pH typed wrongly: decimals swapped (60 %), one tenth off (25 %) or one
  hundredth off (15 %). PCO2 and HCO3 stay as measured.
- ``wrong_unit``: one PCO2 (40 %) or PO2 (60 %) written in the other pressure unit: a kPa number in
  an mmHg column (US-style CSV, Parquet) or an mmHg number in a kPa column (European-style CSV).
  The canonical record holds what a correct reading of the export gives.
- ``wrong_blood_in_tube``: every analyte (pH, gases, HCO3, BE, SaO2, Hb, Na, K, Cl, lactate, glucose,
  COHb, MetHb) comes from another patient's sample; label, times, oxygen chart and SpO2 stay.
- ``late_analysis``: resulted 45-180 min after collection; meanwhile PO2 falls 0.15 %/min, PCO2 rises
  0.04 mmHg/min, lactate rises 0.012 mmol/L/min and HCO3 falls as much (domain-methods.md section 8).
- ``decimal_slip``: PO2 (50 %), PCO2 (20 %), Hb (15 %) or lactate (15 %) written ten times too large
  or too small (84.5 -> 845 or 8.45).
- ``duplicate_export``: the identical row appears again in the export 1-3 days later.
- ``corrected_resend``: the sample was first sent with a different PO2 (5-20 % off), FiO2 (0.10 off)
  or temperature (the analyser default 37.0) and re-sent 1-2 days later with the value kept in the
  canonical record. ``value_before`` is the first-sent value.
- ``text_result``: one measured cell holds text instead of a number: "haemolysed" (K), "clotted"
  (PO2) or "see comment" (lactate). CSV sources only; the canonical value is NULL.
- ``line_flush_dilution``: an arterial-line sample (collection method ``arterial_line``) mixed
  with 10-40 % of the line's flush fluid:
  0.9 % saline (Na 154, Cl 154 mmol/L; no Hb, K, glucose, HCO3 or CO2; PO2 that of room air) in 80 %
  of cases, 5 % glucose (278 mmol/L glucose, no electrolytes) in 20 %. Every analyte mixes linearly
  (COHb and MetHb are fractions of Hb, so they stay); pH follows from the diluted HCO3 and PCO2; the
  oxygen content mixes linearly and PO2 is the PO2 that holds it. Arterial samples only.

**Physically visible.** The faults that change values are visible when the faulted record carries
physical evidence on its own (``evidence.py``) - venous blood, air contamination, under-documented
FiO2, pH transcription, wrong units and decimal slips. So air in a sample whose PO2 was already near
150 mmHg, a unit error whose value lands in range, or a pH one hundredth off are not visible. Wrong
blood in tube is visible when the record carries evidence; or when the sample jumps away from the
patient and back - its previous and its next sample, both within 24 h, differ from it in the same
direction by at least 2.0 g/dL Hb, 8 mmol/L Na or 8 mmol/L Cl while agreeing with each other within half
that (delta-check limits and window of domain-methods.md section 8, "within 24 h", from memory there; Cl
as Na, common practice); or when two independent analytes, Hb by 2.0 g/dL and Na or Cl by 8 mmol/L,
differ from a sample taken within 12 h. One analyte changing on its own is not counted: a transfusion
raises Hb, a bypass prime lowers it with sodium unchanged, saline raises chloride, a sodium correction
moves sodium (``lookalikes.py``), so physics cannot tell a single-analyte change from wrong blood.
A line-flush dilution is visible when the patient's nearest other sample within 72 h had an Hb higher
by more than the reference change value of 8.56 % (Hb CVa 1.5 %, CVi 2.7 %; domain-methods.md
section 8, CVs from memory there) and, beside it, chloride rose
by at least 4.5 mmol/L (about the reference change value of chloride: CVa 1.0 %, CVi 1.2 %, from
memory), sodium moved towards 154 by more than 2.38 % (the sodium reference change value) or glucose
rose by at least 3 mmol/L and 50 %; or when the record carries evidence. Late analysis (the time
stamps), an impossible charted FiO2 (the device table), duplicates, corrections and text results are
always visible in the export itself.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from synthetic_data import devices as dev
from synthetic_data import physics as phys
from synthetic_data.evidence import evidence
from synthetic_data.forward_model import REPORTED, SYRINGE, analyser_report, assemble_records

DEFAULT_FAULT_RATES: dict[str, float] = {
    "venous_as_arterial": 0.010,
    "air_contamination": 0.008,
    "fio2_under_documented": 0.010,
    "fio2_device_mismatch": 0.006,
    "ph_transcription": 0.005,
    "wrong_unit": 0.004,
    "wrong_blood_in_tube": 0.003,
    "late_analysis": 0.008,
    "decimal_slip": 0.004,
    "duplicate_export": 0.006,
    "corrected_resend": 0.003,
    "text_result": 0.004,
    "line_flush_dilution": 0.006,
}
FAULT_TYPES: tuple[str, ...] = tuple(DEFAULT_FAULT_RATES)
STATE_FAULTS = ("venous_as_arterial", "air_contamination", "late_analysis", "line_flush_dilution")
RECORD_FAULTS = ("ph_transcription", "wrong_unit", "decimal_slip", "text_result")
EVIDENCE_FAULTS = (
    "venous_as_arterial",
    "air_contamination",
    "fio2_under_documented",
    "ph_transcription",
    "wrong_unit",
    "decimal_slip",
)
WBIT_ANALYTES = (*REPORTED, "sao2_is_calculated")
FAULTED_COLUMNS = (
    *REPORTED,
    "sao2_is_calculated",
    "o2_device",
    "o2_flow_l_min",
    "fio2",
    "resulted_at",
)
"""The only canonical columns a fault can change (the rest of a faulted record stays as it was)."""
WBIT_HB_DELTA_G_DL = 2.0
WBIT_NA_DELTA_MMOL_L = 8.0
NEIGHBOUR_WINDOW_HOURS = 72.0
EXCURSION_WINDOW_HOURS = 24.0
"""A jump away and back counts when both neighbours are this close (WBIT-oriented limits "within 24 h")."""
FAST_CHANGE_HOURS = 12.0
"""Hb and Na or Cl moving together this fast is faster than any look-alike moves both (a transfusion or a
bypass prime moves Hb alone; a sodium correction at most 9 mmol/L per 24 h moves Na alone)."""
HB_RCV_PCT = 8.56
NA_RCV_PCT = 2.38
CL_RISE_MMOL_L = 4.5
SALINE_NA_CL_MMOL_L = 154.0
DEXTROSE_GLUCOSE_MMOL_L = 278.0
"""5 % glucose: 50 g/L over 180.16 g/mol."""
ROOM_TEMPERATURE_C = 22.0
TEXT_RESULTS = {"haemolysed": "k_mmol_l", "clotted": "pao2_mmhg", "see comment": "lactate_mmol_l"}

GROUND_TRUTH_SCHEMA: dict[str, pl.DataType] = {
    "sample_id": pl.String(),
    "fault_type": pl.String(),
    "detail": pl.String(),
    "physically_visible": pl.Boolean(),
    "field": pl.String(),
    "value_before": pl.Float64(),
    "value_after": pl.Float64(),
    "cell_text": pl.String(),
    "resend_delay_days": pl.Int64(),
}


def scale_fault_rates(total: float, base: dict[str, float] | None = None) -> dict[str, float]:
    """The default mix of fault types, scaled so that the rates add up to ``total``."""
    base = DEFAULT_FAULT_RATES if base is None else base
    if total < 0 or total > 0.5:
        raise ValueError(f"total fault rate must be between 0 and 0.5, got {total}")
    s = sum(base.values())
    return {k: (v * total / s if s else 0.0) for k, v in base.items()}


def assign_faults(rng: np.random.Generator, state: pl.DataFrame, rates: dict[str, float]) -> pl.DataFrame:
    """Choose the faulted samples (at most one fault each; never a look-alike) and the details of each.

    ``state`` is the forward model's output, one row per sample in ``_row`` order. Returns one row
    per faulted sample, sorted by ``_row``.
    """
    n = state.height
    masks = state.select(
        (pl.col("lookalike_idx") < 0).alias("ordinary"),
        (pl.col("sample_type") == "arterial").alias("arterial"),
        (
            pl.col("true_device").is_in(["nasal_cannula", "simple_mask", "reservoir_mask", "venturi_mask"])
            & (pl.col("o2_device") == pl.col("true_device"))
        )
        .fill_null(False)
        .alias("on_oxygen_charted"),
        pl.col("o2_device")
        .is_in(["room_air", "nasal_cannula", "simple_mask", "venturi_mask", "reservoir_mask"])
        .fill_null(False)
        .alias("bounded_device"),
        pl.col("source").is_in(["eu_style", "us_style"]).alias("csv_source"),
        (pl.col("collection_method") == "arterial_line").fill_null(False).alias("line"),
    )
    taken = ~masks["ordinary"].to_numpy()
    eligible: dict[str, np.ndarray] = {
        # venous blood in an "arterial" syringe is a missed artery at a puncture, never the line's
        "venous_as_arterial": (masks["arterial"] & ~masks["line"]).to_numpy(),
        "air_contamination": masks["arterial"].to_numpy(),
        # a flush can only dilute what an arterial line gives
        "line_flush_dilution": (masks["arterial"] & masks["line"]).to_numpy(),
        "fio2_under_documented": masks["on_oxygen_charted"].to_numpy(),
        "fio2_device_mismatch": masks["bounded_device"].to_numpy(),
        "text_result": masks["csv_source"].to_numpy(),
    }
    parts: list[pl.DataFrame] = []
    for fault in FAULT_TYPES:
        k = round(rates.get(fault, 0.0) * n)
        if k == 0:
            continue
        ok = eligible.get(fault, np.ones(n, dtype=bool)) & ~taken
        candidates = np.flatnonzero(ok)
        chosen = np.sort(rng.choice(candidates, size=min(k, candidates.size), replace=False))
        taken[chosen] = True
        m = chosen.size
        field: np.ndarray = np.full(m, None, dtype=object)
        mode: np.ndarray = np.full(m, None, dtype=object)
        text: np.ndarray = np.full(m, None, dtype=object)
        delay = np.full(m, -1, dtype=np.int64)
        resend = np.full(m, -1, dtype=np.int64)
        if fault == "ph_transcription":
            field[:] = "ph"
            mode = rng.choice(np.array(["swap", "tenth", "hundredth"], dtype=object), m, p=[0.6, 0.25, 0.15])
        elif fault == "wrong_unit":
            field = rng.choice(np.array(["paco2_mmhg", "pao2_mmhg"], dtype=object), m, p=[0.4, 0.6])
        elif fault == "decimal_slip":
            field = rng.choice(
                np.array(["pao2_mmhg", "paco2_mmhg", "hb_g_dl", "lactate_mmol_l"], dtype=object),
                m,
                p=[0.5, 0.2, 0.15, 0.15],
            )
            mode = rng.choice(np.array(["times_10", "div_10"], dtype=object), m)
        elif fault == "text_result":
            pick = rng.choice(len(TEXT_RESULTS), m, p=[0.4, 0.3, 0.3])
            text = np.array(list(TEXT_RESULTS), dtype=object)[pick]
            field = np.array(list(TEXT_RESULTS.values()), dtype=object)[pick]
        elif fault == "late_analysis":
            delay = 45 + rng.integers(0, 136, m)
        elif fault == "duplicate_export":
            resend = 1 + rng.integers(0, 3, m)
        elif fault == "corrected_resend":
            field = rng.choice(np.array(["pao2_mmhg", "fio2", "temperature_c"], dtype=object), m)
            resend = 1 + rng.integers(0, 2, m)
        elif fault == "line_flush_dilution":
            mode = rng.choice(np.array(["saline", "glucose"], dtype=object), m, p=[0.8, 0.2])
        parts.append(
            pl.DataFrame(
                {
                    "_row": chosen.astype(np.int64),
                    "fault": np.full(m, fault, dtype=object),
                    "fault_field": field,
                    "fault_mode": mode,
                    "cell_text": text,
                    "delay_min": delay,
                    "resend_delay_days": resend,
                    "f_u1": rng.random(m),
                    "f_u2": rng.random(m),
                },
                schema_overrides={
                    "fault": pl.String,
                    "fault_field": pl.String,
                    "fault_mode": pl.String,
                    "cell_text": pl.String,
                },
            )
        )
    if not parts:
        return _empty_assignments()
    out = pl.concat(parts).sort("_row").with_columns(pl.col("delay_min", "resend_delay_days").replace(-1, None))
    return _choose_donors(rng, state, out)


def _empty_assignments() -> pl.DataFrame:
    return pl.DataFrame(
        schema={
            "_row": pl.Int64,
            "fault": pl.String,
            "fault_field": pl.String,
            "fault_mode": pl.String,
            "cell_text": pl.String,
            "delay_min": pl.Int64,
            "resend_delay_days": pl.Int64,
            "f_u1": pl.Float64,
            "f_u2": pl.Float64,
            "donor_row": pl.Int64,
        }
    )


def _choose_donors(rng: np.random.Generator, state: pl.DataFrame, assigned: pl.DataFrame) -> pl.DataFrame:
    """For wrong blood in tube: an ordinary sample of another patient whose blood ended up in the tube."""
    rows = assigned["_row"].to_numpy()
    wbit = (assigned["fault"] == "wrong_blood_in_tube").to_numpy()
    donor = np.full(rows.size, -1, dtype=np.int64)
    patient = state["patient_idx"].to_numpy()
    pool = np.flatnonzero((state["lookalike_idx"] < 0).to_numpy())
    todo = np.flatnonzero(wbit)
    for _ in range(50):  # redraw the few donors that happen to be the same patient
        if todo.size == 0:
            break
        donor[todo] = pool[rng.integers(0, pool.size, todo.size)]
        todo = todo[patient[donor[todo]] == patient[rows[todo]]]
    if todo.size:
        raise ValueError("wrong blood in tube needs samples from at least two patients; generate more rows")
    return assigned.with_columns(pl.Series("donor_row", donor).replace(-1, None))


def _f(frame: pl.DataFrame, name: str) -> np.ndarray:
    return frame.get_column(name).cast(pl.Float64).to_numpy()


def _fault_state(faulty: pl.DataFrame) -> pl.DataFrame:
    """Change the syringe (and for chart faults the chart) of the chosen samples."""
    fault = faulty.get_column("fault").to_numpy()
    u1 = _f(faulty, "f_u1")
    po2, pco2, hco3 = _f(faulty, "blood_po2"), _f(faulty, "blood_pco2"), _f(faulty, "blood_hco3")
    lactate = _f(faulty, "blood_lactate")
    new = {name: _f(faulty, name) for name in SYRINGE}

    venous = fault == "venous_as_arterial"
    for blood, name in (
        ("blood_po2", "venous_po2_37"),
        ("blood_pco2", "venous_pco2_37"),
        ("blood_hco3", "venous_hco3_37"),
    ):
        new[blood] = np.where(venous, _f(faulty, name), new[blood])

    air_po2 = phys.AIR_O2_FRACTION * (
        _f(faulty, "barometric_pressure_mmhg") - phys.water_vapour_pressure_mmhg(ROOM_TEMPERATURE_C)
    )
    share = 0.3 + 0.5 * u1
    air = fault == "air_contamination"
    new["blood_po2"] = np.where(air, po2 + share * (air_po2 - po2), new["blood_po2"])
    new["blood_pco2"] = np.where(air, pco2 * (1.0 - 0.4 * share), new["blood_pco2"])
    new["blood_hco3"] = np.where(air, hco3 * (1.0 - 0.03 * share), new["blood_hco3"])

    late = fault == "late_analysis"
    delay = np.nan_to_num(_f(faulty, "delay_min"))
    new["blood_po2"] = np.where(late, po2 * (1.0 - 0.0015 * delay), new["blood_po2"])
    new["blood_pco2"] = np.where(late, pco2 + 0.04 * delay, new["blood_pco2"])
    new["blood_hco3"] = np.where(late, hco3 - 0.012 * delay, new["blood_hco3"])
    new["blood_lactate"] = np.where(late, lactate + 0.012 * delay, new["blood_lactate"])

    flush = fault == "line_flush_dilution"
    if flush.any():
        _dilute(
            new,
            flush,
            0.10 + 0.30 * u1,
            faulty.get_column("fault_mode").to_numpy() == "glucose",
            _f(faulty, "p50_std"),
            air_po2,
        )

    out = faulty.with_columns(pl.Series(k, v) for k, v in new.items())
    # chart faults
    f = pl.col("fault")
    codes = (
        out.get_column("o2_device")
        .replace_strict({d: i for i, d in enumerate(dev.DEVICES)}, default=-1, return_dtype=pl.Int64)
        .fill_null(-1)
        .to_numpy()
    )
    lo, hi = dev.charting_envelope(codes, np.nan_to_num(_f(out, "o2_flow_l_min"), nan=6.0))
    mismatch = np.where(
        hi <= 0.8,
        np.round(np.minimum(1.0, hi + 0.10 + 0.25 * u1), 2),
        np.round(np.maximum(0.21, lo - 0.10 - 0.15 * u1), 2),
    )
    return out.with_columns(
        pl.when(f == "late_analysis")
        .then(pl.col("collected_at") + pl.duration(minutes=pl.col("delay_min")))
        .otherwise(pl.col("resulted_at"))
        .alias("resulted_at"),
        # oxygen given, room air charted
        pl.when(f == "fio2_under_documented")
        .then(pl.lit("room_air"))
        .otherwise(pl.col("o2_device"))
        .alias("o2_device"),
        pl.when(f == "fio2_under_documented").then(0.0).otherwise(pl.col("o2_flow_l_min")).alias("o2_flow_l_min"),
        pl.when(f == "fio2_under_documented")
        .then(0.21)
        .when(f == "fio2_device_mismatch")
        .then(pl.Series(mismatch))
        .otherwise(pl.col("fio2"))
        .alias("fio2"),
    )


def _dilute(
    blood: dict[str, np.ndarray],
    mask: np.ndarray,
    fraction: np.ndarray,
    glucose_fluid: np.ndarray,
    p50_std: np.ndarray,
    fluid_po2: np.ndarray,
) -> None:
    """Mix the blood in ``mask`` with a share ``fraction`` of saline (or 5 % glucose where
    ``glucose_fluid``), in place."""
    f = np.where(mask, fraction, 0.0)
    keep = 1.0 - f
    saline = ~glucose_fluid
    hb = blood["blood_hb"]
    dys = (blood["blood_cohb"] + blood["blood_methb"]) / 100.0
    ph37 = phys.ph_from_hco3(blood["blood_pco2"], blood["blood_hco3"])
    p50 = phys.p50_mmhg(p50_std, ph37, blood["blood_pco2"], 37.0)
    content = phys.o2_content(blood["blood_po2"], hb * (1.0 - dys), p50, 37.0)
    fluid_content = phys.o2_solubility(37.0) * fluid_po2
    mixed_content = keep * content + f * fluid_content
    for name in ("blood_hb", "blood_k", "blood_lactate", "blood_hco3", "blood_pco2"):
        blood[name] = keep * blood[name]
    for name in ("blood_na", "blood_cl"):
        blood[name] = keep * blood[name] + np.where(saline, f * SALINE_NA_CL_MMOL_L, 0.0)
    blood["blood_glucose"] = keep * blood["blood_glucose"] + np.where(glucose_fluid, f * DEXTROSE_GLUCOSE_MMOL_L, 0.0)
    ph_mixed = phys.ph_from_hco3(blood["blood_pco2"], blood["blood_hco3"])
    p50_mixed = phys.p50_mmhg(p50_std, ph_mixed, blood["blood_pco2"], 37.0)
    po2 = phys.po2_from_content(mixed_content, blood["blood_hb"] * (1.0 - dys), p50_mixed, 37.0)
    blood["blood_po2"] = np.where(mask, po2, blood["blood_po2"])


def _fault_record(reported: pl.DataFrame) -> pl.DataFrame:
    """Transcription and export errors on one value; adds ``value_before`` and ``value_after``."""
    fault = reported.get_column("fault").to_numpy()
    field = reported.get_column("fault_field").fill_null("").to_numpy()
    mode = reported.get_column("fault_mode").fill_null("").to_numpy()
    source = reported.get_column("source").to_numpy()
    u1 = _f(reported, "f_u1")
    hit = np.isin(fault, RECORD_FAULTS)
    before = np.full(reported.height, np.nan)
    for name in ("ph", "pao2_mmhg", "paco2_mmhg", "hb_g_dl", "lactate_mmol_l", "k_mmol_l"):
        m = hit & (field == name)
        before[m] = _f(reported, name)[m]
    after = before.copy()
    # pH: the two decimals swapped (7.34 -> 7.43); equal decimals fall back to one tenth off
    centi = np.round(np.nan_to_num(before) * 100).astype(np.int64)
    d1, d2 = (centi // 10) % 10, centi % 10
    sign = np.where(u1 < 0.5, -1.0, 1.0)
    is_ph = fault == "ph_transcription"
    swapped = (centi - 9 * d1 + 9 * d2) / 100.0
    after = np.where(is_ph & (mode == "swap") & (d1 != d2), swapped, after)
    after = np.where(
        is_ph & ((mode == "tenth") | ((mode == "swap") & (d1 == d2))), np.round(before + 0.1 * sign, 2), after
    )
    after = np.where(is_ph & (mode == "hundredth"), np.round(before + 0.01 * sign, 2), after)
    # a pressure in the other unit, read as the column's unit: in the kPa column (European-style CSV) the
    # mmHg number lands and is then read as that many kPa; elsewhere the kPa number lands in mmHg
    unit = fault == "wrong_unit"
    eu = source == "eu_style"
    after = np.where(unit & eu, np.round(before, 1) * phys.MMHG_PER_KPA, after)
    after = np.where(unit & ~eu, np.round(before / phys.MMHG_PER_KPA, 1), after)
    slip = fault == "decimal_slip"
    after = np.where(slip & (mode == "times_10"), np.round(before * 10.0, 1), after)
    after = np.where(slip & (mode != "times_10"), np.round(before / 10.0, 2), after)
    after = np.where(fault == "text_result", np.nan, after)
    columns = {}
    for name in ("ph", "pao2_mmhg", "paco2_mmhg", "hb_g_dl", "lactate_mmol_l", "k_mmol_l"):
        m = hit & (field == name)
        columns[name] = np.where(m, after, _f(reported, name))
    return reported.with_columns(
        *(pl.Series(k, v).fill_nan(None) for k, v in columns.items()),
        pl.Series("value_before", before).fill_nan(None),
        pl.Series("value_after", after).fill_nan(None),
    )


def inject_faults(
    rng: np.random.Generator,
    state: pl.DataFrame,
    records: pl.DataFrame,
    rates: dict[str, float],
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Apply the faults to the clean ``records``; return the faulted records and the ground truth.

    ``state`` is the forward model's output and ``records`` the clean records built from it,
    both one row per sample in ``_row`` order (``_row`` = position).
    """
    assigned = assign_faults(rng, state, rates)
    if assigned.height == 0:
        return records, pl.DataFrame(schema=GROUND_TRUTH_SCHEMA)
    rows = assigned["_row"].to_numpy()
    clean = records[rows]

    # faults in the syringe and the chart; the analyser measures again (with the same analytical errors)
    chosen = state[rows]
    faulty = _fault_state(chosen.hstack(assigned.drop("_row")))
    reported = assemble_records(faulty, analyser_report(faulty))

    # faults in transcription and export of single values
    extra = assigned.select("fault", "fault_field", "fault_mode", "f_u1")
    reported = _fault_record(reported.hstack(extra))

    # wrong blood in tube: every analyte from the donor's clean record
    donors = assigned["donor_row"].fill_null(0).to_numpy()
    donor_values = records.select(WBIT_ANALYTES)[donors]
    is_wbit = pl.col("fault") == "wrong_blood_in_tube"
    reported = reported.with_columns(
        pl.when(is_wbit).then(donor_values[c]).otherwise(pl.col(c)).alias(c) for c in WBIT_ANALYTES
    )
    untouched = [c for c in records.columns if c not in FAULTED_COLUMNS]
    if not reported.select(untouched).equals(clean.select(untouched)):
        raise RuntimeError("a fault changed a column outside FAULTED_COLUMNS")
    # put the faulted values back in place: a scatter of the few changed rows into the columns faults touch
    index = pl.Series(rows)
    out = records.with_columns(records.get_column(c).scatter(index, reported.get_column(c)) for c in FAULTED_COLUMNS)
    neighbours = _nearest_other_sample(out, state, rows)
    truth = _ground_truth(chosen, clean, reported, assigned, neighbours)
    return out, truth


def _nearest_other_sample(records: pl.DataFrame, state: pl.DataFrame, rows: np.ndarray) -> pl.DataFrame:
    """For the given rows: the same patient's nearest other sample (``near_h`` hours away; its Hb, Na, Cl
    and glucose as ``nb_*``) and its previous and next samples (``prev_*``, ``next_*``; hours apart in
    ``prev_h``, ``next_h``). NULL where there is none."""
    values = ("hb_g_dl", "na_mmol_l", "cl_mmol_l", "glucose_mmol_l")
    short = dict(zip(values, ("hb", "na", "cl", "glucose"), strict=True))
    times = records.select("_row", pl.Series("patient_idx", state["patient_idx"]), "collected_at", *values)
    target = times[rows].select("_row", "patient_idx", "collected_at")
    others = times.join(target.select("patient_idx").unique(), on="patient_idx", how="semi").select(
        pl.col("_row").alias("_other"),
        "patient_idx",
        pl.col("collected_at").alias("_other_at"),
        *(pl.col(v).alias(short[v]) for v in values),
    )
    pairs = (
        target.join(others, on="patient_idx")
        .filter(pl.col("_other") != pl.col("_row"))
        .with_columns(((pl.col("_other_at") - pl.col("collected_at")).dt.total_seconds() / 3600.0).alias("dt_h"))
    )

    def pick(frame: pl.DataFrame, key: pl.Expr, prefix: str, hours: pl.Expr) -> pl.DataFrame:
        return (
            frame.sort(pl.col("_row"), key, pl.col("_other"))
            .unique("_row", keep="first", maintain_order=True)
            .select("_row", hours.alias(f"{prefix}_h"), *(pl.col(s).alias(f"{prefix}_{s}") for s in short.values()))
        )

    nearest = pick(pairs, pl.col("dt_h").abs(), "nb", pl.col("dt_h").abs()).rename({"nb_h": "near_h"})
    before = pick(pairs.filter(pl.col("dt_h") <= 0), -pl.col("dt_h"), "prev", -pl.col("dt_h"))
    after = pick(pairs.filter(pl.col("dt_h") > 0), pl.col("dt_h"), "next", pl.col("dt_h"))
    out = target.select("_row")
    for part in (nearest, before, after):
        out = out.join(part, on="_row", how="left", maintain_order="left")
    return out


def _fmt(expr: pl.Expr) -> pl.Expr:
    """A number as short text for the ground truth detail (NULL shows as 'none')."""
    return pl.when(expr.is_null()).then(pl.lit("none")).otherwise(expr.round(2).cast(pl.String))


def _ground_truth(
    state: pl.DataFrame,
    clean: pl.DataFrame,
    faulted: pl.DataFrame,
    assigned: pl.DataFrame,
    neighbours: pl.DataFrame,
) -> pl.DataFrame:
    """One row per faulted sample: what was done, and whether physics can see it."""
    frame = pl.concat(
        [
            assigned.drop("fault_field"),
            clean.select(pl.all().name.prefix("b_")),
            faulted.select(pl.all().name.prefix("a_")),
            faulted.select("fault_field", "value_before", "value_after"),
            evidence(faulted).select("any_evidence"),
            state.select("true_device", "fio2_true"),
            neighbours.drop("_row"),
        ],
        how="horizontal",
    )
    f = pl.col("fault")

    def before(name: str) -> pl.Expr:
        return pl.col(f"b_{name}")

    def after(name: str) -> pl.Expr:
        return pl.col(f"a_{name}")

    def of_field(prefix: str) -> pl.Expr:
        expr = pl.lit(None, dtype=pl.Float64)
        for name in ("ph", "pao2_mmhg", "paco2_mmhg", "hb_g_dl", "lactate_mmol_l", "k_mmol_l", "fio2", "temperature_c"):
            expr = pl.when(pl.col("field") == name).then(pl.col(f"{prefix}{name}").cast(pl.Float64)).otherwise(expr)
        return expr

    # 1. the canonical column each fault is about
    frame = frame.with_columns(
        pl.when(f.is_in(["venous_as_arterial", "air_contamination", "late_analysis"]))
        .then(pl.lit("pao2_mmhg"))
        .when(f.is_in(["fio2_under_documented", "fio2_device_mismatch"]))
        .then(pl.lit("fio2"))
        .when(f.is_in(["wrong_blood_in_tube", "line_flush_dilution"]))
        .then(pl.lit("hb_g_dl"))
        # a correction of an FiO2 that was never charted is a correction of PO2 instead
        .when((f == "corrected_resend") & (pl.col("fault_field") == "fio2") & before("fio2").is_null())
        .then(pl.lit("pao2_mmhg"))
        .otherwise(pl.col("fault_field"))
        .alias("field")
    )
    # 2. values before and after, in canonical units
    sign = pl.when(pl.col("f_u2") < 0.5).then(-1.0).otherwise(1.0)
    first_sent = (
        pl.when(pl.col("field") == "pao2_mmhg")
        .then((before("pao2_mmhg") * (1.0 + sign * (0.05 + 0.15 * pl.col("f_u1")))).round(1))
        .when(pl.col("field") == "fio2")
        .then(pl.when(before("fio2") >= 0.31).then(before("fio2") - 0.10).otherwise(before("fio2") + 0.10).round(2))
        .when(pl.col("field") == "temperature_c")
        .then(pl.when(before("temperature_c") == 37.0).then(pl.lit(37.8)).otherwise(pl.lit(37.0)))
    )
    record_faults = f.is_in(RECORD_FAULTS)
    frame = frame.with_columns(
        pl.when(record_faults)
        .then(pl.col("value_before"))
        .when(f == "corrected_resend")
        .then(first_sent)
        .otherwise(of_field("b_"))
        .alias("value_before"),
        pl.when(record_faults).then(pl.col("value_after")).otherwise(of_field("a_")).alias("value_after"),
    )
    # 3. visible to physics?
    near = (pl.col("near_h") <= NEIGHBOUR_WINDOW_HOURS).fill_null(False)

    def excursion(name: str, short: str, limit: float) -> pl.Expr:
        """The value differs by at least ``limit`` from both the previous and the next sample within
        ``EXCURSION_WINDOW_HOURS``, in the same direction, while those two agree within half the limit:
        one sample away from the patient and back."""
        up = ((after(name) - pl.col(f"prev_{short}")) >= limit) & ((after(name) - pl.col(f"next_{short}")) >= limit)
        down = ((pl.col(f"prev_{short}") - after(name)) >= limit) & ((pl.col(f"next_{short}") - after(name)) >= limit)
        both = (pl.col("prev_h") <= EXCURSION_WINDOW_HOURS) & (pl.col("next_h") <= EXCURSION_WINDOW_HOURS)
        back = (pl.col(f"prev_{short}") - pl.col(f"next_{short}")).abs() <= limit / 2
        return (both & back & (up | down)).fill_null(False)

    def fast_change(name: str, short: str, limit: float) -> pl.Expr:
        """At least ``limit`` away from the nearest sample taken within ``FAST_CHANGE_HOURS``."""
        return (
            (pl.col("near_h") <= FAST_CHANGE_HOURS) & ((after(name) - pl.col(f"nb_{short}")).abs() >= limit)
        ).fill_null(False)

    delta_seen = (
        excursion("hb_g_dl", "hb", WBIT_HB_DELTA_G_DL)
        | excursion("na_mmol_l", "na", WBIT_NA_DELTA_MMOL_L)
        | excursion("cl_mmol_l", "cl", WBIT_NA_DELTA_MMOL_L)
        | (
            fast_change("hb_g_dl", "hb", WBIT_HB_DELTA_G_DL)
            & (
                fast_change("na_mmol_l", "na", WBIT_NA_DELTA_MMOL_L)
                | fast_change("cl_mmol_l", "cl", WBIT_NA_DELTA_MMOL_L)
            )
        )
    )
    hb_fall = (pl.col("nb_hb") - after("hb_g_dl")) > HB_RCV_PCT / 100.0 * pl.col("nb_hb")
    towards_saline = ((after("cl_mmol_l") - pl.col("nb_cl")) >= CL_RISE_MMOL_L) | (
        (pl.col("nb_na") < SALINE_NA_CL_MMOL_L)
        & ((after("na_mmol_l") - pl.col("nb_na")) > NA_RCV_PCT / 100.0 * pl.col("nb_na"))
    )
    glucose_rise = ((after("glucose_mmol_l") - pl.col("nb_glucose")) >= 3.0) & (
        after("glucose_mmol_l") >= 1.5 * pl.col("nb_glucose")
    )
    dilution_seen = near & hb_fall & (towards_saline | glucose_rise).fill_null(False)
    visible = (
        pl.when(f.is_in(EVIDENCE_FAULTS))
        .then(pl.col("any_evidence"))
        .when(f == "wrong_blood_in_tube")
        .then(pl.col("any_evidence") | delta_seen.fill_null(False))
        .when(f == "line_flush_dilution")
        .then(pl.col("any_evidence") | dilution_seen.fill_null(False))
        .otherwise(pl.lit(True))
    )
    # 4. what was done, in words
    gas = pl.format(
        "pO2 {} -> {} mmHg, pCO2 {} -> {} mmHg",
        _fmt(before("pao2_mmhg")),
        _fmt(after("pao2_mmhg")),
        _fmt(before("paco2_mmhg")),
        _fmt(after("paco2_mmhg")),
    )
    change = pl.format("{} {} -> {}", pl.col("field"), _fmt(pl.col("value_before")), _fmt(pl.col("value_after")))
    detail = (
        pl.when(f == "venous_as_arterial")
        .then(pl.format("venous blood labelled arterial: {}; SpO2 {} % is the patient's", gas, _fmt(after("spo2_pct"))))
        .when(f == "air_contamination")
        .then(pl.format("air in the syringe: {}", gas))
        .when(f == "late_analysis")
        .then(
            pl.format(
                "analysed {} min after collection: {}, lactate {} -> {} mmol/L",
                pl.col("delay_min"),
                gas,
                _fmt(before("lactate_mmol_l")),
                _fmt(after("lactate_mmol_l")),
            )
        )
        .when(f == "fio2_under_documented")
        .then(
            pl.format(
                "on {} (FiO2 about {}), charted as room air, flow 0, FiO2 0.21",
                pl.col("true_device"),
                _fmt(pl.col("fio2_true")),
            )
        )
        .when(f == "fio2_device_mismatch")
        .then(
            pl.format(
                "charted FiO2 {} cannot come from {} at {} L/min",
                _fmt(after("fio2")),
                after("o2_device"),
                _fmt(after("o2_flow_l_min")),
            )
        )
        .when(f == "ph_transcription")
        .then(pl.format("pH {} written as {}", _fmt(pl.col("value_before")), _fmt(pl.col("value_after"))))
        .when(f == "wrong_unit")
        .then(
            pl.format(
                "{} written in the other pressure unit: {} mmHg read as {} mmHg",
                pl.col("field"),
                _fmt(pl.col("value_before")),
                _fmt(pl.col("value_after")),
            )
        )
        .when(f == "wrong_blood_in_tube")
        .then(
            pl.format(
                "analytes from another patient's sample: Hb {} -> {} g/dL, Na {} -> {} mmol/L, {}",
                _fmt(before("hb_g_dl")),
                _fmt(after("hb_g_dl")),
                _fmt(before("na_mmol_l")),
                _fmt(after("na_mmol_l")),
                gas,
            )
        )
        .when(f == "decimal_slip")
        .then(pl.format("decimal mark slipped: {}", change))
        .when(f == "duplicate_export")
        .then(pl.format("exported again unchanged {} day(s) later", pl.col("resend_delay_days")))
        .when(f == "corrected_resend")
        .then(
            pl.format(
                "first sent with {} {}, re-sent {} day(s) later with {}",
                pl.col("field"),
                _fmt(pl.col("value_before")),
                pl.col("resend_delay_days"),
                _fmt(pl.col("value_after")),
            )
        )
        .when(f == "text_result")
        .then(pl.format("{} reported as the text '{}'", pl.col("field"), pl.col("cell_text")))
        .when(f == "line_flush_dilution")
        .then(
            pl.format(
                "mixed with {} % {} from the arterial line: Hb {} -> {} g/dL, Na {} -> {}, Cl {} -> {} mmol/L, "
                "glucose {} -> {} mmol/L",
                (10.0 + 30.0 * pl.col("f_u1")).round(0).cast(pl.Int64),
                pl.when(pl.col("fault_mode") == "glucose")
                .then(pl.lit("5 % glucose"))
                .otherwise(pl.lit("0.9 % saline")),
                _fmt(before("hb_g_dl")),
                _fmt(after("hb_g_dl")),
                _fmt(before("na_mmol_l")),
                _fmt(after("na_mmol_l")),
                _fmt(before("cl_mmol_l")),
                _fmt(after("cl_mmol_l")),
                _fmt(before("glucose_mmol_l")),
                _fmt(after("glucose_mmol_l")),
            )
        )
    )
    return frame.select(
        after("sample_id").alias("sample_id"),
        f.alias("fault_type"),
        detail.alias("detail"),
        visible.alias("physically_visible"),
        pl.when(f == "duplicate_export").then(None).otherwise(pl.col("field")).alias("field"),
        pl.when(f == "duplicate_export").then(None).otherwise(pl.col("value_before")).alias("value_before"),
        pl.when(f == "duplicate_export").then(None).otherwise(pl.col("value_after")).alias("value_after"),
        pl.col("cell_text"),
        pl.col("resend_delay_days"),
    ).cast(GROUND_TRUTH_SCHEMA)
