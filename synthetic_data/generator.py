"""``generate()``: the demo data set as canonical records plus the ground truth of its faults;
``generate_demo()``: the same plus the truth file of its clinical look-alikes, the oxygen prescriptions
feed and the oxygen truth of every sample."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date

import numpy as np
import polars as pl

from synthetic_data.faults import DEFAULT_FAULT_RATES, FAULT_TYPES, inject_faults
from synthetic_data.forward_model import CANONICAL_COLUMNS, analyser_report, assemble_records, true_state
from synthetic_data.hospital import (
    ANALYSER_SOURCE,
    N_STAFF,
    SITE_ALTITUDE_M,
    SOURCES,
    UNIT_TYPES,
    UNITS,
    concat_draws,
    draw_patients,
    draw_samples,
    to_frame,
    weather_by_day,
)
from synthetic_data.lookalikes import (
    DEFAULT_LOOKALIKE_RATES,
    LOOKALIKE_KINDS,
    draw_lookalikes,
    lookalike_rows,
)
from synthetic_data.prescribing import complete_prescriptions, draw_prescriptions, link_samples
from synthetic_data.titration import draw_aims


def check_rates(rates: dict[str, float], known: tuple[str, ...], what: str) -> dict[str, float]:
    """Shares of all samples per fault type or look-alike kind: missing names get 0; unknown names,
    negative shares or shares adding up to more than a half are errors."""
    unknown = sorted(set(rates) - set(known))
    if unknown:
        raise ValueError(f"unknown {what} {unknown}; known: {list(known)}")
    full = {k: float(rates.get(k, 0.0)) for k in known}
    if any(v < 0 for v in full.values()) or sum(full.values()) > 0.5:
        raise ValueError(f"{what} rates must be >= 0 and add up to at most 0.5")
    return full


DEFAULT_START = date(2025, 1, 6)
DEFAULT_DAYS = 60
DEFAULT_SAO2_CALCULATED_SHARE = 0.10
LOOKALIKE_SCHEMA: dict[str, pl.DataType] = {
    "sample_id": pl.String(),
    "lookalike_kind": pl.String(),
    "detail": pl.String(),
}


O2_PRESCRIBED_UNCHARTED_SHARE = 0.05
"""Share of samples whose chart does not say whether oxygen was prescribed (invented)."""
OXYGEN_TRUTH_SCHEMA: dict[str, pl.DataType] = {
    "sample_id": pl.String(),
    "patient_id": pl.String(),
    "encounter_id": pl.String(),
    "unit": pl.String(),
    "unit_type": pl.String(),
    "lookalike": pl.Boolean(),
    "adult": pl.Boolean(),
    "arterial": pl.Boolean(),
    "on_oxygen": pl.Boolean(),
    "hypercapnic_risk": pl.Boolean(),
    "prescription_id": pl.String(),
    "prescribed_low_pct": pl.Float64(),
    "prescribed_high_pct": pl.Float64(),
    "titrate_basis": pl.String(),
    "titrate_low_pct": pl.Float64(),
    "titrate_high_pct": pl.Float64(),
    "aim_position": pl.String(),
    "sat_pct": pl.Float64(),
    "pao2_mmhg": pl.Float64(),
}
"""Per sample, the generator's oxygen truth: who, where, on oxygen or not (the device really used), the
prescription in force by the generator's own link, the target the staff titrated to, the aim, and the
patient's functional arterial saturation and PaO2 at body temperature (``sat_pct``, ``pao2_mmhg``)."""


@dataclass(frozen=True)
class DemoData:
    """One generated demo set: canonical records, the injected faults, the clinical look-alikes, the oxygen
    prescriptions feed (``prescribing.PRESCRIPTION_SCHEMA``) and the oxygen truth of each sample."""

    records: pl.DataFrame
    faults: pl.DataFrame
    lookalikes: pl.DataFrame
    prescriptions: pl.DataFrame
    oxygen: pl.DataFrame


def source_of(sample_id: pl.Expr) -> pl.Expr:
    """The export source of a sample, read from its sample_id prefix."""
    expr = pl.lit(None, dtype=pl.String)
    for source, prefix in SOURCES.items():
        expr = pl.when(sample_id.str.starts_with(prefix)).then(pl.lit(source)).otherwise(expr)
    return expr


def _label(draws: pl.DataFrame) -> pl.DataFrame:
    """Give each sample its export source and an accession number that grows with collection time."""
    source = pl.col("analyser_id").replace_strict(ANALYSER_SOURCE, return_dtype=pl.String)
    prefix = source.replace_strict(SOURCES, return_dtype=pl.String)
    number = pl.col("collected_at").rank("ordinal").over(source).cast(pl.Int64) + 1_000_000
    return draws.with_columns(
        source.alias("source"),
        pl.format("{}{}", prefix, number.cast(pl.String).str.zfill(8)).alias("sample_id"),
    )


def generate_demo(
    rows: int = 20_000,
    seed: int = 7,
    start_date: date = DEFAULT_START,
    days: int = DEFAULT_DAYS,
    fault_rates: dict[str, float] | None = None,
    *,
    sao2_calculated_share: float = DEFAULT_SAO2_CALCULATED_SHARE,
    lookalike_rates: dict[str, float] | None = None,
) -> DemoData:
    """Invent ``rows`` blood gas records from ``days`` days starting ``start_date``.

    The records have exactly the canonical columns of ``pipeline.schema.FIELDS`` in canonical
    units (UTC times without a zone), one patient's samples next to each other. ``faults`` has one
    ground-truth row per faulted sample (``faults.py``), ``lookalikes`` one row per look-alike
    sample (``lookalikes.py``). The same arguments always give the same data. ``fault_rates`` and
    ``lookalike_rates`` map types or kinds to shares of all samples (missing: 0; ``None``: the
    defaults). Faults use their own random stream, so a set without faults has every sample
    without a fault identical to the set with faults.
    """
    if rows < 2:
        raise ValueError("rows must be at least 2")
    if days < 1:
        raise ValueError("days must be at least 1")
    if not 0.0 <= sao2_calculated_share <= 1.0:
        raise ValueError("sao2_calculated_share must be between 0 and 1")
    rates = check_rates(DEFAULT_FAULT_RATES if fault_rates is None else fault_rates, FAULT_TYPES, "fault types")
    kinds = check_rates(
        DEFAULT_LOOKALIKE_RATES if lookalike_rates is None else lookalike_rates, LOOKALIKE_KINDS, "look-alike kinds"
    )
    hospital_rng, weather_rng, fault_rng, lookalike_rng, analyser_rng, id_rng, rx_rng, aim_rng = (
        np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(8)
    )

    per_kind = lookalike_rows(rows, kinds)
    ordinary_rows = rows - sum(per_kind.values())
    shares = np.array([u.sample_share for u in UNITS])
    per_unit = hospital_rng.multinomial(ordinary_rows, shares / shares.sum())
    patients, sample_patient = draw_patients(hospital_rng, UNITS, per_unit, start_date, days)
    ordinary = draw_samples(hospital_rng, patients, sample_patient, days, sao2_calculated_share)
    del patients, sample_patient
    special = draw_lookalikes(lookalike_rng, per_kind, start_date, days, sao2_calculated_share)
    draws = concat_draws([ordinary, *special])
    del ordinary, special
    n_patients = int(draws["patient_idx"].max()) + 1
    patient_ids = id_rng.choice(9_000_000, size=n_patients, replace=False) + 1_000_000
    encounter_ids = id_rng.choice(90_000_000, size=2 * n_patients, replace=False) + 10_000_000
    staff_ids = id_rng.choice(90_000, size=N_STAFF, replace=False) + 10_000
    frame = to_frame(draws, start_date, patient_ids, encounter_ids, staff_ids)
    del draws
    frame = _label(frame).join(weather_by_day(weather_rng, days), on="day", how="left", maintain_order="left")

    # oxygen prescriptions, the one in force at each sample, and the oxygen titrated to its target
    prescriptions = draw_prescriptions(rx_rng, frame)
    frame = frame.join(link_samples(frame, prescriptions), on="_row", how="left", maintain_order="left")
    frame = draw_aims(aim_rng, frame).with_columns(
        pl.col("rx_low").alias("target_spo2_low_pct"),
        pl.col("rx_high").alias("target_spo2_high_pct"),
        pl.when(pl.Series(rx_rng.random(frame.height) >= O2_PRESCRIBED_UNCHARTED_SHARE))
        .then(pl.col("prescription_id").is_not_null())
        .alias("o2_prescribed"),
    )

    state = true_state(frame, SITE_ALTITUDE_M, analyser_rng)
    del frame
    prescriptions = complete_prescriptions(prescriptions, state)
    oxygen = state.select(
        "sample_id",
        "patient_id",
        "encounter_id",
        "unit",
        pl.col("unit").replace_strict(UNIT_TYPES, default=None, return_dtype=pl.String).alias("unit_type"),
        (pl.col("lookalike_idx") >= 0).alias("lookalike"),
        (pl.col("age_exact") >= 18.0).alias("adult"),
        (pl.col("sample_type") == "arterial").alias("arterial"),
        (pl.col("true_device") != "room_air").alias("on_oxygen"),
        "hypercapnic_risk",
        "prescription_id",
        pl.col("rx_low").alias("prescribed_low_pct"),
        pl.col("rx_high").alias("prescribed_high_pct"),
        pl.when(pl.col("titrate_low").is_not_null()).then(pl.col("titrate_basis")).alias("titrate_basis"),
        pl.col("titrate_low").alias("titrate_low_pct"),
        pl.col("titrate_high").alias("titrate_high_pct"),
        "aim_position",
        (100.0 * pl.col("sat_true")).alias("sat_pct"),
        pl.col("pao2_true").alias("pao2_mmhg"),
    ).cast(OXYGEN_TRUTH_SCHEMA)
    records = assemble_records(state, analyser_report(state))
    records, truth = inject_faults(fault_rng, state, records, rates)
    lookalikes = (
        state.filter(pl.col("lookalike_idx") >= 0)
        .select(
            "sample_id",
            pl.col("lookalike_idx")
            .replace_strict(dict(enumerate(LOOKALIKE_KINDS)), return_dtype=pl.String)
            .alias("lookalike_kind"),
            pl.col("lookalike_detail").alias("detail"),
        )
        .cast(LOOKALIKE_SCHEMA)
    )
    return DemoData(records.select(CANONICAL_COLUMNS), truth, lookalikes, prescriptions, oxygen)


def generate(
    rows: int = 20_000,
    seed: int = 7,
    start_date: date = DEFAULT_START,
    days: int = DEFAULT_DAYS,
    fault_rates: dict[str, float] | None = None,
    *,
    sao2_calculated_share: float = DEFAULT_SAO2_CALCULATED_SHARE,
    lookalike_rates: dict[str, float] | None = None,
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """``(canonical records, fault ground truth)`` of ``generate_demo`` (see there)."""
    demo = generate_demo(
        rows,
        seed,
        start_date,
        days,
        fault_rates,
        sao2_calculated_share=sao2_calculated_share,
        lookalike_rates=lookalike_rates,
    )
    return demo.records, demo.faults
