"""Parsing in SQL changes nothing in the store: the demo exports loaded with every cell read
by the Python parser, and loaded the way the pipeline loads them (DuckDB reads and types the
usual cells, the Python parser the rest), give the same tables row for row.

The demo generator (synthetic_data/, an independent program) writes all three sample
layouts (US-style CSV, European-style Latin-1 CSV with decimal commas and kPa, Parquet) and
the oxygen prescriptions feed, with its export faults: qualifiers, text results, unknown
codes, bad dates, DST edges, implausible values, duplicates, corrections and re-sends.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

import pipeline.ingest.load as load_module
from pipeline.config import SiteConfig, load_config
from pipeline.demo import prepare_demo
from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.log import Log
from pipeline.store import open_store

ROWS = 4_000  # small: about 60 files per layout, a few thousand records
FILES_PER_INPUT = 20  # the first three weeks of each feed: every layout, fault kind and re-send, in a third of the time
KEY = b"equivalence-test-key-0123456789abcdef"
# Every table ingestion writes, without the columns that differ by design (run ids, load
# times); ordered by the file and the row so the comparison is row for row.
TABLES = {
    "records": "select * exclude (run_id) from records order by file_sha256, source_row",
    "superseded_records": "select * exclude (run_id, superseded_in_run) from superseded_records "
    "order by file_sha256, source_row, superseded_by_file, superseded_by_row",
    "prescriptions": "select * exclude (run_id) from prescriptions order by file_sha256, source_row",
    "superseded_prescriptions": "select * exclude (run_id, superseded_in_run) from superseded_prescriptions "
    "order by file_sha256, source_row, superseded_by_file, superseded_by_row",
    "quarantine": "select * exclude (run_id) from quarantine order by file_sha256, source_row",
    "merged_duplicates": "select * exclude (run_id) from merged_duplicates "
    "order by file_sha256, source_row, duplicate_of",
    "record_value_notes": "select * from record_value_notes order by file_sha256, sample_id, field",
    "ingested_files": "select * exclude (run_id, loaded_at) from ingested_files order by file_sha256",
}


def load_all(config: SiteConfig, store: Path, parser: str, monkeypatch: pytest.MonkeyPatch) -> list[FileOutcome]:
    monkeypatch.setattr(load_module, "PARSER", parser)
    con = open_store(store)
    try:
        return [
            ingest_file(con, path, source.profile, f"run-{parser}", KEY)
            for source in config.inputs
            for path in source.files()[:FILES_PER_INPUT]
        ]
    finally:
        con.close()


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Iterator[SiteConfig]:
    workdir = tmp_path_factory.mktemp("equivalence")
    yield load_config(prepare_demo(workdir, rows=ROWS, seed=11, log=Log(quiet=True)))


def test_sql_parsing_gives_the_store_python_parsing_gives(demo, tmp_path, monkeypatch):
    python = load_all(demo, tmp_path / "python.duckdb", "python", monkeypatch)
    sql = load_all(demo, tmp_path / "sql.duckdb", "sql", monkeypatch)
    fields = ("path", "outcome", "reason_code", "message", "rows_in", "rows_loaded", "rows_quarantined",
              "rows_duplicate", "rows_superseded_in_file", "corrections", "notes")  # fmt: skip
    assert [[getattr(f, n) for n in fields] for f in sql] == [[getattr(f, n) for n in fields] for f in python]
    # The demo profiles still load every demo file (no column they map is missing).
    assert [f.path.name for f in sql if f.outcome != "loaded"] == []
    kinds = {f.kind for f in sql if f.outcome == "loaded"}
    assert kinds == {"samples", "prescriptions"} and all(f.balanced for f in sql)
    assert sum(f.rows_quarantined for f in sql) > 0 and sum(f.corrections for f in sql) > 0

    stores = {name: open_store(tmp_path / f"{name}.duckdb", read_only=True) for name in ("python", "sql")}
    try:
        for table, query in TABLES.items():
            want = stores["python"].execute(query).fetchall()
            got = stores["sql"].execute(query).fetchall()
            assert len(got) == len(want), table
            differ = [(a, b) for a, b in zip(want, got, strict=True) if a != b]
            assert not differ, (table, differ[:3])
        notes = stores["sql"].execute("select count(*) from record_value_notes").fetchall()[0][0]
        assert notes > 0  # qualifiers and text results were in the demo, and kept
    finally:
        for con in stores.values():
            con.close()
