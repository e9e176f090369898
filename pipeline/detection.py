"""Detection report: how many injected faults of each type the pipeline caught.

Compares a ground-truth table (``sample_id, fault_type, physically_visible``; the demo
generator writes one) with what the store holds. A faulted sample counts as caught when
it carries a data-quality flag, was quarantined, or (for an exported duplicate) was
merged rather than stored twice. Clean samples (not in the ground truth) are checked for
data-quality flags: each one is a false alarm.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import polars as pl

from pipeline.sql_files import read_sql

REQUIRED_CATCH_RATE = 0.90
MAX_CLEAN_FLAG_RATE = 0.02


def detection_tables(con: duckdb.DuckDBPyConnection, truth: pl.DataFrame) -> tuple[pl.DataFrame, pl.DataFrame]:
    """(per fault type, clean records) as frames."""
    con.register("ground_truth", truth.select("sample_id", "fault_type", "physically_visible"))
    try:
        statements = con.extract_statements(read_sql("audit/detection.sql"))
        for statement in statements[:-2]:
            con.execute(statement.query)
        by_fault = con.sql(statements[-2].query).pl()
        clean = con.sql(statements[-1].query).pl()
    finally:
        con.unregister("ground_truth")
    return by_fault, clean


def format_report(by_fault: pl.DataFrame, clean: pl.DataFrame) -> str:
    lines = [
        f"{'fault type':<24}{'injected':>9}{'visible':>9}{'caught':>8}{'caught %':>10}   main rules",
    ]
    for row in by_fault.iter_rows(named=True):
        share = "-" if row["caught_share"] is None else f"{100 * row['caught_share']:.1f}"
        lines.append(
            f"{row['fault_type']:<24}{row['injected']:>9}{row['visible']:>9}{row['caught']:>8}{share:>10}   "
            f"{row['main_rules'] or ''}"
        )
    c = clean.row(0, named=True)
    lines.append(
        f"clean records: {c['clean_records']}, with a data-quality flag: {c['flagged']} "
        f"({100 * (c['flag_share'] or 0):.2f} %)"
    )
    return "\n".join(lines)


def read_truth(path: Path) -> pl.DataFrame:
    return pl.read_parquet(path) if path.suffix == ".parquet" else pl.read_csv(path)
