"""``generate()``: the demo data set as canonical records plus the ground truth of its faults."""

from __future__ import annotations

from datetime import date

import numpy as np
import polars as pl

from synthetic_data.faults import DEFAULT_FAULT_RATES, check_fault_rates, inject_faults
from synthetic_data.forward_model import (
    CANONICAL_COLUMNS,
    analyser_report,
    assemble_records,
    physiology_connection,
    true_state,
)
from synthetic_data.hospital import (
    ANALYSER_SOURCE,
    SITE_ALTITUDE_M,
    SOURCES,
    draw_patients,
    draw_samples,
    weather_by_day,
)

DEFAULT_START = date(2025, 1, 6)
DEFAULT_DAYS = 60
DEFAULT_SAO2_CALCULATED_SHARE = 0.10


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
        pl.len().over("patient_idx").alias("patient_samples"),
    )


def generate(
    rows: int = 20_000,
    seed: int = 7,
    start_date: date = DEFAULT_START,
    days: int = DEFAULT_DAYS,
    fault_rates: dict[str, float] | None = None,
    *,
    sao2_calculated_share: float = DEFAULT_SAO2_CALCULATED_SHARE,
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Invent ``rows`` blood gas records from ``days`` days starting ``start_date``.

    Returns ``(canonical, ground_truth)``: the records with exactly the canonical columns of
    ``pipeline.schema.FIELDS`` in canonical units (UTC times without a zone), one patient's
    samples next to each other, and one ground-truth row per faulted sample (``faults.py``). The same
    arguments always give the same data. ``fault_rates`` maps fault types to shares of all
    samples (missing types: 0; ``None``: ``DEFAULT_FAULT_RATES``).
    """
    if rows < 2:
        raise ValueError("rows must be at least 2")
    if days < 1:
        raise ValueError("days must be at least 1")
    if not 0.0 <= sao2_calculated_share <= 1.0:
        raise ValueError("sao2_calculated_share must be between 0 and 1")
    rates = check_fault_rates(DEFAULT_FAULT_RATES if fault_rates is None else fault_rates)
    hospital_rng, weather_rng, fault_rng = (
        np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(3)
    )

    patients, sample_patient = draw_patients(hospital_rng, rows, start_date, days)
    draws = draw_samples(hospital_rng, patients, sample_patient, start_date, days, sao2_calculated_share)
    del patients, sample_patient
    draws = _label(draws).join(weather_by_day(weather_rng, days), on="day", how="left", maintain_order="left")

    con = physiology_connection()
    try:
        state = true_state(con, draws, SITE_ALTITUDE_M)
        del draws
        records = assemble_records(state, analyser_report(con, state))
        records, truth = inject_faults(con, fault_rng, state, records, rates)
    finally:
        con.close()
    return records.select(CANONICAL_COLUMNS), truth
