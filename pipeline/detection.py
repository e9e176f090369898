"""Detection report: injected faults caught, and clinical look-alikes left alone.

Compares the demo generator's two truth files with what the store holds:

- ``ground_truth`` (``sample_id, fault_type, physically_visible``): a faulted sample counts as
  caught when it carries a data-quality flag, was quarantined, or (for an exported duplicate)
  was merged rather than stored twice.
- ``lookalikes`` (``sample_id, lookalike_kind``): real patients whose physiology looks odd but is
  not an error. Each data-quality flag on one is a false alarm, and a look-alike labelled
  arterial or unknown whose audit status is ``excluded`` is a real patient lost from the
  oxygenation statistics.
- Clean records (in neither file): each data-quality flag is a false alarm.

Targets (product brief): each fault type caught in at least ``REQUIRED_CATCH_RATE`` of its
physically visible cases; at most ``MAX_CLEAN_FLAG_RATE`` of clean records and at most
``MAX_LOOKALIKE_FLAG_RATE`` of each look-alike kind with a data-quality flag; no look-alike
excluded or left out of the store.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import duckdb
import polars as pl

from pipeline.sql_files import read_sql

REQUIRED_CATCH_RATE = 0.95
MAX_CLEAN_FLAG_RATE = 0.01
MAX_LOOKALIKE_FLAG_RATE = 0.05
LOOKALIKES_FILE = "lookalikes.parquet"
"""Name of the look-alike truth file the demo generator writes beside ``ground_truth.parquet``."""


@dataclass(frozen=True)
class DetectionTables:
    """The three tables of the report (see ``sql/audit/detection.sql``)."""

    by_fault: pl.DataFrame
    by_lookalike: pl.DataFrame
    clean: pl.DataFrame


def empty_lookalikes() -> pl.DataFrame:
    return pl.DataFrame(schema={"sample_id": pl.String, "lookalike_kind": pl.String})


def detection_tables(
    con: duckdb.DuckDBPyConnection, truth: pl.DataFrame, lookalikes: pl.DataFrame | None = None
) -> DetectionTables:
    """The per-fault, per-look-alike-kind and clean-record tables for the store behind ``con``."""
    kinds = empty_lookalikes() if lookalikes is None else lookalikes.select("sample_id", "lookalike_kind")
    con.register("ground_truth", truth.select("sample_id", "fault_type", "physically_visible"))
    con.register("lookalike_truth", kinds)
    try:
        statements = con.extract_statements(read_sql("audit/detection.sql"))
        for statement in statements[:-3]:
            con.execute(statement.query)
        by_fault, by_lookalike, clean = (con.sql(s.query).pl() for s in statements[-3:])
    finally:
        con.unregister("ground_truth")
        con.unregister("lookalike_truth")
    return DetectionTables(by_fault, by_lookalike, clean)


def missed_targets(tables: DetectionTables) -> list[str]:
    """Each target the tables miss, in words (empty when all are met)."""
    missed: list[str] = []
    for row in tables.by_fault.iter_rows(named=True):
        share = row["caught_share"]
        if share is not None and share < REQUIRED_CATCH_RATE:
            missed.append(
                f"{row['fault_type']}: {100 * share:.1f} % of visible cases caught "
                f"(target {100 * REQUIRED_CATCH_RATE:.0f} %)"
            )
    clean_share = tables.clean["flag_share"][0] or 0.0
    if clean_share > MAX_CLEAN_FLAG_RATE:
        missed.append(
            f"clean records: {100 * clean_share:.2f} % with a data-quality flag "
            f"(target at most {100 * MAX_CLEAN_FLAG_RATE:.0f} %)"
        )
    for row in tables.by_lookalike.iter_rows(named=True):
        kind = row["lookalike_kind"]
        if (row["flag_share"] or 0.0) > MAX_LOOKALIKE_FLAG_RATE:
            missed.append(
                f"{kind}: {100 * row['flag_share']:.1f} % with a data-quality flag "
                f"(target at most {100 * MAX_LOOKALIKE_FLAG_RATE:.0f} %)"
            )
        if row["excluded"]:
            missed.append(f"{kind}: {row['excluded']} excluded from the oxygenation statistics (target none)")
        if row["not_loaded"]:
            missed.append(f"{kind}: {row['not_loaded']} not loaded into the store (target none)")
    return missed


def format_report(tables: DetectionTables) -> str:
    """The three tables as text (the per-fault table first)."""
    lines = [f"{'fault type':<24}{'injected':>9}{'visible':>9}{'caught':>8}{'caught %':>10}   main rules"]
    for row in tables.by_fault.iter_rows(named=True):
        share = "-" if row["caught_share"] is None else f"{100 * row['caught_share']:.1f}"
        lines.append(
            f"{row['fault_type']:<24}{row['injected']:>9}{row['visible']:>9}{row['caught']:>8}{share:>10}   "
            f"{row['main_rules'] or ''}"
        )
    if tables.by_lookalike.height:
        lines.append("")
        lines.append(
            f"{'look-alike kind':<24}{'records':>9}{'flagged':>9}{'flagged %':>11}{'excluded':>10}"
            f"{'not loaded':>12}   main rules"
        )
        for row in tables.by_lookalike.iter_rows(named=True):
            lines.append(
                f"{row['lookalike_kind']:<24}{row['records']:>9}{row['flagged']:>9}"
                f"{100 * (row['flag_share'] or 0):>11.1f}{row['excluded']:>10}{row['not_loaded']:>12}   "
                f"{row['main_rules'] or ''}"
            )
    c = tables.clean.row(0, named=True)
    lines.append("")
    lines.append(
        f"clean records: {c['clean_records']}, with a data-quality flag: {c['flagged']} "
        f"({100 * (c['flag_share'] or 0):.2f} %)" + (f"; main rules: {c['main_rules']}" if c["main_rules"] else "")
    )
    missed = missed_targets(tables)
    lines.append(
        "targets: each fault type caught in >= "
        f"{100 * REQUIRED_CATCH_RATE:.0f} % of visible cases; <= {100 * MAX_CLEAN_FLAG_RATE:.0f} % of clean records "
        f"and <= {100 * MAX_LOOKALIKE_FLAG_RATE:.0f} % of each look-alike kind flagged; no look-alike excluded"
    )
    lines.extend([f"  missed: {m}" for m in missed] or ["  all met"])
    return "\n".join(lines)


def read_truth(path: Path) -> pl.DataFrame:
    return pl.read_parquet(path) if path.suffix == ".parquet" else pl.read_csv(path)


def lookalikes_beside(truth_path: Path) -> Path | None:
    """The look-alike truth file beside a ground-truth file, when there is one."""
    candidate = truth_path.with_name(LOOKALIKES_FILE)
    return candidate if candidate.exists() else None
