"""Small stores for the audit and report tests: records go straight into ``records`` (the
ingest path has its own tests) with keyed pseudonyms, then derive, rules, and the audit
stage run over all of them as a run would.
"""

from __future__ import annotations

import dataclasses
from datetime import datetime, timedelta
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
from tests.rule_harness import insert_records, record

KEY = b"audit-test-key-0123456789abcdef"
RUN_ID = "20260301T000000Z-a1b2c3"
JAN = datetime(2026, 1, 12, 9, 0)


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


def set_derived(con: duckdb.DuckDBPyConnection, values: dict[str, dict[str, Any]]) -> None:
    """Overwrite columns of ``derived`` for the given samples: audit tests fix each sample's age group,
    oxygen status, target and metrics by hand, so they test the audit's counting, not the derive code."""
    for sample_id, columns in values.items():
        assignments = ", ".join(f"{name} = ?" for name in columns)
        con.execute(f"update derived set {assignments} where sample_id = ?", [*columns.values(), sample_id])


def set_audit_status(con: duckdb.DuckDBPyConnection, statuses: dict[str, str]) -> None:
    """Overwrite the audit status (usable, caution, excluded) of the given samples."""
    for sample_id, status in statuses.items():
        con.execute("update audit_status set audit_status = ? where sample_id = ?", [status, sample_id])


# Derived values of each group, set directly in `derived` (the derive stage has its own tests): age group,
# oxygen status, supplemental oxygen documented, saturation and target, A-a excess and P/F band.
ROOM_AIR = {
    "on_supplemental_oxygen": False,
    "target_source": "standard",
    "target_low_pct": 94.0,
    "target_high_pct": 98.0,
}
ON_O2 = {**ROOM_AIR, "on_supplemental_oxygen": True}
NO_TARGET = {"target_source": None, "target_low_pct": None, "target_high_pct": None}
# (prefix, count, age group, oxygen status, audit status, sample type, other derived values)
OXYGEN_GROUPS: list[tuple[str, int, str, str | None, str, str, dict[str, Any]]] = [
    ("G1-INTARGET", 4, "adult", "in_target", "usable", "arterial",
     {**ROOM_AIR, "arterial_saturation_pct": 96.0, "aa_gradient_excess_mmhg": -2.0, "pf_band": "none"}),
    ("G2-HYPO", 3, "adult", "hypoxaemic", "usable", "arterial",
     {**ROOM_AIR, "arterial_saturation_pct": 85.0, "aa_gradient_excess_mmhg": 30.0, "pf_band": "mild"}),
    # nothing documented, PaO2 within room air; a saturation above 98 % must not make it "above target"
    ("G3-UNKNOWN", 2, "adult", "oxygen_unknown", "caution", "arterial",
     {**ROOM_AIR, "arterial_saturation_pct": 99.0, "aa_gradient_excess_mmhg": None, "pf_band": None}),
    # room air documented, PaO2 beyond what room air allows: its FiO2 (and so A-a and P/F) cannot be trusted
    ("G4-UNDOC", 2, "adult", "undocumented_oxygen", "usable", "arterial",
     {**ROOM_AIR, "arterial_saturation_pct": 99.5, "aa_gradient_excess_mmhg": -60.0, "pf_band": "none"}),
    ("G5-ABOVE", 3, "adult", "above_target_on_oxygen", "usable", "arterial",
     {**ON_O2, "arterial_saturation_pct": 99.2, "aa_gradient_excess_mmhg": None, "pf_band": "none"}),
    ("G6-HYPER", 2, "adult", "hyperoxaemic", "usable", "arterial",
     {**ON_O2, "arterial_saturation_pct": 99.6, "aa_gradient_excess_mmhg": None, "pf_band": "none"}),
    # hypercapnic-risk target 88-92 %: saturation 90 % is in target, not hypoxaemic (BTS 2017)
    ("G7-HYPERCAPNIC", 1, "adult", "in_target", "usable", "arterial",
     {**ON_O2, "target_source": "hypercapnic_risk", "target_low_pct": 88.0, "target_high_pct": 92.0,
      "arterial_saturation_pct": 90.0, "aa_gradient_excess_mmhg": None, "pf_band": "moderate"}),
    ("G8-BELOW", 1, "adult", "below_target", "usable", "arterial",
     {**ON_O2, "arterial_saturation_pct": 92.0, "aa_gradient_excess_mmhg": None, "pf_band": "moderate"}),
    # an adult on a unit type the site sets to no target: never in or above target
    ("G9-NOTARGET", 2, "adult", "not_assessed", "usable", "arterial",
     {**ON_O2, **NO_TARGET, "arterial_saturation_pct": 99.5, "aa_gradient_excess_mmhg": None, "pf_band": "none"}),
    # no age and no birth date: adult targets apply, counted in the adult rates
    ("U1-INTARGET", 2, "unknown", "in_target", "usable", "arterial",
     {**ROOM_AIR, "arterial_saturation_pct": 96.0, "aa_gradient_excess_mmhg": None, "pf_band": "none"}),
    ("U2-HYPO", 1, "unknown", "hypoxaemic", "usable", "arterial",
     {**ON_O2, "arterial_saturation_pct": 86.0, "aa_gradient_excess_mmhg": None, "pf_band": "severe"}),
    # children and neonates: values that would count if they were adults, yet they must not
    ("C1-CHILD", 3, "child", "not_assessed", "usable", "arterial",
     {**ROOM_AIR, **NO_TARGET, "arterial_saturation_pct": 99.5, "aa_gradient_excess_mmhg": 30.0, "pf_band": "none"}),
    ("C2-CHILDHYPO", 2, "child", "hypoxaemic", "usable", "arterial",
     {**ON_O2, "target_source": "unit_type", "arterial_saturation_pct": 85.0, "aa_gradient_excess_mmhg": None,
      "pf_band": "mild"}),
    ("N1-NEONATE", 2, "neonate", "not_assessed", "usable", "arterial",
     {**ON_O2, **NO_TARGET, "arterial_saturation_pct": None, "aa_gradient_excess_mmhg": None, "pf_band": "severe"}),
    # excluded: a data-quality flag, and a venous sample (no oxygen status)
    ("X1-EXCLUDED", 1, "adult", "hypoxaemic", "excluded", "arterial",
     {**ROOM_AIR, "arterial_saturation_pct": 85.0, "aa_gradient_excess_mmhg": 30.0, "pf_band": "mild"}),
    ("X2-VENOUS", 1, "adult", None, "excluded", "venous",
     {**ROOM_AIR, "arterial_saturation_pct": None, "aa_gradient_excess_mmhg": None, "pf_band": None}),
]


def oxygen_store(
    tmp: Path,
    cells: list[tuple[str, datetime, int]] | None = None,
    k: int = 1,
) -> tuple[duckdb.DuckDBPyConnection, SiteConfig]:
    """OXYGEN_GROUPS in each (unit, month start, copies) of ``cells`` (default: once in Ward O in January 2026):
    records stored, derive and rules run, then each sample's derived values and audit status set by hand as its
    group says; the audit is built over them. Returns the open store and its configuration."""
    rows, derived, statuses = [], {}, {}
    for cell_number, (unit, when, copies) in enumerate(cells or [("Ward O", JAN, 1)]):
        for prefix, count, age_group, status, audit_status, sample_type, values in OXYGEN_GROUPS:
            for i in range(count * copies):
                sample_id = f"{prefix}-{cell_number}-{i}"
                n = len(rows)
                rows.append(
                    record(
                        sample_id,
                        unit=unit,
                        patient_id=f"MRN-O-{n:05d}",
                        sample_type=sample_type,
                        collected_at=when + timedelta(minutes=3 * n),
                        resulted_at=when + timedelta(minutes=3 * n + 2),
                    )
                )
                derived[sample_id] = {"age_group": age_group, "oxygen_status": status, **values}
                statuses[sample_id] = audit_status
    config = audit_config(tmp, k=k, complete_periods_only=False)
    con = build_store(tmp, rows, config)
    set_derived(con, derived)
    set_audit_status(con, statuses)
    audit(con, config)
    return con, config
