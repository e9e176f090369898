"""Small stores for the audit and report tests: records go straight into ``records`` (the
ingest path has its own tests) with keyed pseudonyms, then derive, rules, and the audit
stage run over all of them as a run would.
"""

from __future__ import annotations

import dataclasses
from datetime import datetime
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from pipeline.audit import build_audit
from pipeline.audit_settings import AuditSettings
from pipeline.config import SiteConfig
from pipeline.derive import derive
from pipeline.pseudonym import add_patient_key
from pipeline.rules import Catalogue, evaluate_rules, load_catalogue
from pipeline.sql_files import run_sql
from pipeline.store import open_store
from tests.rule_harness import insert_records

KEY = b"audit-test-key-0123456789abcdef"
RUN_ID = "20260301T000000Z-a1b2c3"


def audit_config(tmp: Path, *, k: int = 11, **audit: Any) -> SiteConfig:
    settings = dataclasses.replace(AuditSettings(), **audit)
    return SiteConfig(
        path=None,
        site_name="Invented audit test site",
        store_path=tmp / "store" / "abg_audit.duckdb",
        output_folder=tmp / "output",
        key_file=None,
        inputs=(),
        barometric_pressure_mmhg=760.0,
        small_cell_threshold=k,
        audit=settings,
    )


def build_store(tmp: Path, rows: list[dict[str, Any]] | pl.DataFrame, config: SiteConfig) -> duckdb.DuckDBPyConnection:
    """Store the records with keyed pseudonyms, derive, evaluate rules, record a run and a file event."""
    con = open_store(config.store_path)
    if isinstance(rows, pl.DataFrame):
        rows = rows.to_dicts()
    insert_records(con, rows, run_id=RUN_ID)
    keys = add_patient_key(pl.DataFrame({"patient_id": [r["patient_id"] for r in rows]}).unique(), KEY)
    con.register("patient_keys", keys)
    con.execute(
        "update records set patient_key = k.patient_key from patient_keys as k where records.patient_id = k.patient_id"
    )
    con.unregister("patient_keys")
    catalogue: Catalogue = load_catalogue(config.thresholds)
    con.execute("begin transaction")
    run_sql(con, "derive/00_scope.sql", run_id=RUN_ID, rebuild=True)
    derive(con, catalogue, config)
    evaluate_rules(con, catalogue, RUN_ID)
    con.execute("commit")
    con.execute(
        "insert into runs (run_id, command, started_at, outcome) values (?, 'test', ?, 'running')",
        [RUN_ID, datetime(2026, 3, 1)],
    )
    con.execute(
        "insert into file_events (run_id, source_path, file_sha256, profile, outcome, rows_in, rows_loaded, "
        "rows_quarantined, rows_duplicate, rows_superseded_in_file) "
        "values (?, ?, 'abc', 'test', 'loaded', ?, ?, 0, 0, 0)",
        [RUN_ID, str(tmp / "exports" / "export_1.csv"), len(rows), len(rows)],
    )
    return con


def audit(con: duckdb.DuckDBPyConnection, config: SiteConfig) -> None:
    build_audit(con, config, load_catalogue(config.thresholds), RUN_ID)


def frame(con: duckdb.DuckDBPyConnection, table: str, where: str = "true") -> pl.DataFrame:
    return con.sql(f"select * from {table} where {where}").pl()
