"""End to end on the demo data: exports written by the generator, loaded by the pipeline,
checked against the generator's ground truth.

Targets (product brief): each fault type caught in at least 90 % of the cases where physics
makes it visible; at most 2 % of clean records with a data-quality flag. The table is
printed (run pytest with -s to see it).
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import polars as pl
import pytest

from pipeline.config import load_config
from pipeline.demo import prepare_demo
from pipeline.detection import MAX_CLEAN_FLAG_RATE, REQUIRED_CATCH_RATE, detection_tables, format_report, read_truth
from pipeline.log import Log
from pipeline.run import run_pipeline
from pipeline.store import open_store

ROWS = 20_000


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory) -> tuple[Path, object]:
    workdir = tmp_path_factory.mktemp("demo")
    log = Log(quiet=True)
    config = load_config(prepare_demo(workdir, rows=ROWS, seed=7, log=log))
    result = run_pipeline(config, log, command="demo", create_key=True)
    return workdir, result


def test_every_file_reconciles_and_none_is_rejected(demo_run):
    _, result = demo_run
    assert result.files and all(f.outcome == "loaded" for f in result.files)
    assert all(f.balanced for f in result.files)
    assert result.total("rows_in") == (
        result.total("rows_loaded") + result.total("rows_quarantined") + result.total("rows_duplicate")
        + result.total("rows_superseded_in_file")
    )


def test_fault_detection_meets_the_targets(demo_run):
    workdir, _ = demo_run
    con = open_store(workdir / "store" / "abg_audit.duckdb", read_only=True)
    try:
        by_fault, clean = detection_tables(con, read_truth(workdir / "exports" / "ground_truth.parquet"))
    finally:
        con.close()
    print("\n" + format_report(by_fault, clean))
    assert by_fault.height == 12  # every fault type the generator injects
    misses = by_fault.filter(pl.col("caught_share") < REQUIRED_CATCH_RATE)
    assert misses.height == 0, misses
    assert clean["flag_share"][0] <= MAX_CLEAN_FLAG_RATE
    assert clean["clean_records"][0] > 0.9 * ROWS


def test_a_second_run_loads_nothing_and_changes_nothing(demo_run):
    workdir, first = demo_run
    store = workdir / "store" / "abg_audit.duckdb"
    con = duckdb.connect(str(store), read_only=True)
    before = con.execute("select count(*), sum(hash(sample_id, content_hash)) from records").fetchall()
    flags_before = con.execute("select count(*) from flags").fetchall()
    con.close()
    log = Log(quiet=True)
    again = run_pipeline(load_config(workdir / "site.toml"), log)
    assert all(f.outcome == "already_loaded" for f in again.files)
    assert again.scope_size == 0
    con = duckdb.connect(str(store), read_only=True)
    assert con.execute("select count(*), sum(hash(sample_id, content_hash)) from records").fetchall() == before
    assert con.execute("select count(*) from flags").fetchall() == flags_before
    runs = con.execute("select count(*) from runs where outcome = 'succeeded'").fetchall()[0][0]
    con.close()
    assert runs == 2 and first.run_id != again.run_id
