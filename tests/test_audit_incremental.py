"""The audit's aggregate layer kept incrementally gives the same tables as a rebuild.

A site is loaded in several nightly steps (new days, a correction that moves a sample to
another unit and period, a re-sent file of duplicates); after each step the published
tables, the layer and the review worklist must equal what a from-scratch rebuild
(``rebuild=True``) publishes from the same store.
"""

from __future__ import annotations

import io
from pathlib import Path
from typing import Any

import duckdb
import pytest

import pipeline.publish as publish_module
from pipeline.audit import LAYER_TABLES, PUBLISHED_TABLES
from pipeline.config import load_config
from pipeline.log import Log
from pipeline.run import run_pipeline
from tests.nightly_site import HEADER, add_day, day_rows, default_patient, keep_umask, make_site

__all__ = ["keep_umask"]  # an autouse fixture

# Per-run, not aggregate: what this run did with its files (a rebuild loads none).
PER_RUN = {"audit_run_reconciliation"}
NO_ANALYSER = {"audit_analyser_qc"}  # the test exports name no analyser
COMPARED = [t for t in PUBLISHED_TABLES if t not in PER_RUN]
LAYER_COMPARED = [t for t in LAYER_TABLES if t not in ("audit_layer_runs", "audit_layer_state")]
WORKLIST = (
    "select review_rank, severity, rule_title, evidence, unit, analyser_id, collected_at, sample_id, "
    "patient_key, audit_status, rule_id from review_worklist"
)


@pytest.fixture
def tracked(monkeypatch: pytest.MonkeyPatch) -> list[bool]:
    """Whether each run's audit updated the layer incrementally (True) or rebuilt it."""
    calls: list[bool] = []
    original = publish_module.build_audit

    def build(*args: Any, **kwargs: Any) -> bool:
        updated = original(*args, **kwargs)
        calls.append(updated)
        return updated

    monkeypatch.setattr(publish_module, "build_audit", build)
    return calls


def site(root: Path, period: str = "week") -> Path:
    config = make_site(root, days=4, rows_per_day=30, rejected_file=False)
    with config.open("a", encoding="utf-8") as handle:
        handle.write(f'\n[audit]\nperiod = "{period}"\ncomplete_periods_only = false\nworklist_days = 0\n')
    return config


def run(config: Path, *, rebuild: bool = False) -> None:
    run_pipeline(load_config(config), Log(stream=io.StringIO()), rebuild=rebuild)


def snapshot(config: Path) -> dict[str, list[tuple[Any, ...]]]:
    con = duckdb.connect(str(load_config(config).store_path), read_only=True)
    try:
        tables = {t: con.execute(f"select * from {t} order by all").fetchall() for t in COMPARED + LAYER_COMPARED}
        tables["review_worklist"] = con.execute(WORKLIST + " order by review_rank").fetchall()
        return tables
    finally:
        con.close()


def write_export(root: Path, name: str, rows: list[str]) -> None:
    (root / "exports" / name).write_text(HEADER + "".join(rows), encoding="utf-8")


def assert_same_as_rebuild(config: Path) -> None:
    incremental = snapshot(config)
    run(config, rebuild=True)
    rebuilt = snapshot(config)
    for table, rows in rebuilt.items():
        assert rows or table in NO_ANALYSER, f"{table} is empty: nothing compared"
        assert incremental[table] == rows, f"{table} differs from a rebuild"


def test_nightly_steps_publish_what_a_rebuild_publishes(tmp_path: Path, tracked: list[bool]) -> None:
    root = tmp_path / "site"
    config = site(root)
    run(config)  # days 1-4: the layer is built from every record
    add_day(root, 8)  # a new week
    run(config)
    add_day(root, 15)
    # A correction of a day-2 sample: another patient, ward, week and PaO2, no flag (its old unit and
    # week lose a sample that no other sample in scope is in).
    patient = default_patient(7777)
    write_export(
        root,
        "day15_corrections.csv",
        [f"S2-5,{patient},W1,2026-03-15 09:30,2026-03-15 10:00,A,RA,0.21,7.40,40,86,24\n"],
    )
    # A re-sent file: rows already held (duplicates merged, nothing changes).
    write_export(root, "day08_resent.csv", day_rows(8, 5))
    run(config)
    store = load_config(config).store_path
    con = duckdb.connect(str(store), read_only=True)
    moved = con.execute("select unit, period_start::varchar from audit_sample_fact where sample_id = 'S2-5'").fetchall()
    duplicates = con.execute("select count(*) from merged_duplicates").fetchall()[0][0]
    con.close()
    assert moved == [("W1", "2026-03-09")]
    assert duplicates >= 5
    # The comparison covers the adult-only families: the test exports have no age (age unknown: adult targets)
    # and every 7th row a PaO2 of 150 mmHg on documented room air (oxygen given but not documented).
    con = duckdb.connect(str(store), read_only=True)
    families = con.execute(
        "select sum(age_unknown), sum(age_adult + age_child + age_neonate), sum(undocumented_oxygen), "
        "sum(no_oxygen_documented), sum(oxygen_assessed) from audit_unit_period_counts"
    ).fetchall()[0]
    con.close()
    unknown_age, other_ages, undocumented, no_oxygen, assessed = families
    assert unknown_age > 0 and other_ages == 0
    assert 0 < undocumented < no_oxygen == assessed  # every test row documents room air
    assert tracked == [False, True, True]  # the first run builds the layer, the others update it
    assert_same_as_rebuild(config)
    assert tracked[-1] is False

    # As if a run had been killed after its analysis committed and before its audit did:
    # the layer misses a run, so the next run rebuilds it.
    con = duckdb.connect(str(store))
    con.execute("delete from audit_layer_runs where run_id = (select max(run_id) from audit_layer_runs)")
    con.close()
    add_day(root, 22)
    run(config)
    assert tracked[-1] is False
    # Another reporting period: the layer's rows no longer fit, so it is rebuilt.
    text = config.read_text(encoding="utf-8").replace('period = "week"', 'period = "month"')
    config.write_text(text, encoding="utf-8")
    add_day(root, 23)
    run(config)
    assert tracked[-1] is False
    con = duckdb.connect(str(store), read_only=True)
    periods = con.execute("select distinct period_start::varchar from audit_unit_period_counts").fetchall()
    con.close()
    assert periods == [("2026-03-01",)]
