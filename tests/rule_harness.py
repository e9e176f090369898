"""A small store filled with hand-written records, for rule and derive tests.

Records are inserted straight into ``records`` (ingestion has its own tests), then the
derive and rule stages run over all of them exactly as a run would.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from pipeline.config import SiteConfig
from pipeline.derive import derive
from pipeline.rules import Catalogue, evaluate_rules, load_catalogue
from pipeline.schema import FIELDS, POLARS_TYPES
from pipeline.sql_files import run_sql
from pipeline.store import open_store

T0 = datetime(2026, 1, 5, 10, 0)

# A clean room-air arterial sample of a 40-year-old at sea level: pH 7.40, PaCO2 40,
# HCO3 24.5 fit Henderson-Hasselbalch (7.39 predicted, domain notes section 6); SaO2 96.9 %
# is the Severinghaus saturation for PaO2 90 mmHg (96.95 %, domain notes section 5).
CLEAN: dict[str, Any] = {
    "patient_id": "P1",
    "unit": "Ward A",
    "analyser_id": "AN1",
    "age_years": 40.0,
    "collected_at": T0,
    "resulted_at": T0 + timedelta(minutes=10),
    "sample_type": "arterial",
    "o2_device": "room_air",
    "fio2": 0.21,
    "temperature_c": 37.0,
    "ph": 7.40,
    "paco2_mmhg": 40.0,
    "pao2_mmhg": 90.0,
    "hco3_mmol_l": 24.5,
    "base_excess_mmol_l": 0.0,
    "sao2_pct": 96.9,
    "sao2_is_calculated": False,
    "spo2_pct": 97.0,
    "hb_g_dl": 14.0,
    "na_mmol_l": 140.0,
}


def record(sample_id: str, **changes: Any) -> dict[str, Any]:
    return {"sample_id": sample_id, **CLEAN, **changes}


def site_config(tmp: Path, pb_mmhg: float | None = 760.0, **settings: Any) -> SiteConfig:
    return SiteConfig(
        **settings,
        path=None,
        site_name="test site",
        store_path=tmp / "store.duckdb",
        output_folder=tmp / "out",
        key_file=None,
        inputs=(),
        barometric_pressure_mmhg=pb_mmhg,
    )


def insert_records(con: duckdb.DuckDBPyConnection, rows: list[dict[str, Any]], run_id: str = "t1") -> None:
    schema = {f.name: POLARS_TYPES[f.kind] for f in FIELDS}
    frame = pl.DataFrame(rows, schema_overrides={k: v for k, v in schema.items() if any(k in r for r in rows)})
    frame = frame.with_columns(
        [pl.lit(None, dtype=t).alias(n) for n, t in schema.items() if n not in frame.columns]
        + [
            pl.col("patient_id").alias("patient_key"),
            pl.lit("reported").alias("result_status")
            if "result_status" not in frame.columns
            else pl.col("result_status"),
            pl.lit(run_id).alias("run_id"),
            pl.lit(1).alias("version") if "version" not in frame.columns else pl.col("version"),
            pl.int_range(1, pl.len() + 1).alias("source_row"),
            pl.lit("hand.csv").alias("source_file"),
        ]
    )
    frame = frame.with_columns(pl.col("sample_id").hash().alias("content_hash"))
    con.register("hand_records", frame)
    con.execute("insert into records by name select * from hand_records")
    con.unregister("hand_records")


def evaluate(
    tmp: Path,
    rows: list[dict[str, Any]],
    overrides: dict[str, Any] | None = None,
    pb_mmhg: float | None = 760.0,
    **settings: Any,
) -> duckdb.DuckDBPyConnection:
    """Store the rows, derive and evaluate every rule over all of them; return the open store.

    ``settings`` are further SiteConfig fields (unit_types, oxygen_targets)."""
    con = open_store(tmp / "store.duckdb")
    insert_records(con, rows)
    catalogue: Catalogue = load_catalogue(overrides)
    run_sql(con, "derive/00_scope.sql", run_id="t1", rebuild=True)
    derive(con, catalogue, site_config(tmp, pb_mmhg, **settings))
    evaluate_rules(con, catalogue, "t1")
    return con


def status_of(con: duckdb.DuckDBPyConnection) -> dict[str, str]:
    """sample_id -> audit status (usable, caution, excluded)."""
    return dict(con.execute("select sample_id, audit_status from audit_status").fetchall())


def flagged(con: duckdb.DuckDBPyConnection, rule_id: str) -> dict[str, str]:
    """sample_id -> severity for one rule."""
    rows = con.execute("select sample_id, severity from flags where rule_id = ?", [rule_id]).fetchall()
    return dict(rows)
