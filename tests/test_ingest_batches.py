"""Reading a file in batches changes nothing: the store holds the same rows, reasons and
counts whether a file is parsed in one batch or in many small ones.

Big exports are parsed and staged a batch at a time so memory stays bounded; these tests
shrink the batch to a few rows so that repeats, faults and whole-file verdicts fall across
batch boundaries, and compare every table with a one-batch load of the same file.
"""

from __future__ import annotations

from pathlib import Path

import pytest

import pipeline.ingest.read as read_module
from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.profile import load_profile
from pipeline.store import open_store

FIXTURES = Path(__file__).parent / "fixtures"
KEY = b"test-key-0123456789abcdef"
HEADER = "id,mrn,ward,collected,resulted,type,device,fio2,ph,pco2,po2,hco3\n"
ROW = "S{n},P{p},W{w},2026-03-02 10:{m:02d},2026-03-02 10:{r:02d},A,RA,0.21,{ph},40,{po2},24\n"
TABLES = {
    "records": "select * exclude (source_file) from records order by sample_id",
    "quarantine": "select * exclude (source_file) from quarantine order by source_row",
    "superseded_records": "select * exclude (source_file, superseded_by_file) from superseded_records "
    "order by sample_id, source_row",
    "merged_duplicates": "select * from merged_duplicates order by source_row",
    "record_value_notes": "select * from record_value_notes order by sample_id, field",
}


def rows(first: int, count: int, po2: str = "95", ph: str = "7.40") -> str:
    return "".join(
        ROW.format(n=n, p=n % 7, w=n % 3, m=n % 50, r=n % 50 + 5, ph=ph, po2=po2) for n in range(first, first + count)
    )


def load_both(tmp_path: Path, content: str, monkeypatch: pytest.MonkeyPatch) -> tuple[FileOutcome, FileOutcome, dict]:
    """Load the file in one batch and in batches of 4 rows; return both outcomes and the table differences."""
    profile = load_profile(FIXTURES / "profiles" / "minimal.toml")
    path = tmp_path / "export.csv"
    path.write_text(content, encoding="utf-8")
    outcomes, tables = [], []
    for batch_rows in (read_module.BATCH_ROWS, 4):
        monkeypatch.setattr(read_module, "BATCH_ROWS", batch_rows)
        con = open_store(tmp_path / f"store_{batch_rows}.duckdb")
        try:
            outcomes.append(ingest_file(con, path, profile, "r1", KEY))
            tables.append({name: con.execute(sql).fetchall() for name, sql in TABLES.items()})
        finally:
            con.close()
    differ = {name: (tables[0][name], tables[1][name]) for name in TABLES if tables[0][name] != tables[1][name]}
    return outcomes[0], outcomes[1], differ


def same_outcome(one: FileOutcome, many: FileOutcome) -> None:
    fields = ("outcome", "reason_code", "message", "rows_in", "rows_loaded", "rows_quarantined", "rows_duplicate")
    assert [getattr(one, f) for f in fields] == [getattr(many, f) for f in fields]
    assert (one.rows_superseded_in_file, one.corrections, one.notes) == (
        many.rows_superseded_in_file,
        many.corrections,
        many.notes,
    )


def test_repeats_faults_and_notes_across_batches(tmp_path, monkeypatch):
    content = (
        HEADER
        + rows(1, 9)
        + rows(3, 2)  # the same samples again, same values: duplicates in a later batch
        + rows(5, 2, po2="97")  # and again with other values: the last delivery wins
        + rows(20, 3, po2=">600")  # qualified values keep a note
        + rows(30, 2, po2="ninety")  # unparseable: quarantined with the original cells
        + rows(40, 2, po2="-5")  # impossible: quarantined by the hard limits
        + rows(50, 3, po2="haemolysed")
        + "\n,,,,,,,,,,,\n"  # blank records are not records
        + rows(60, 6)
    )
    one, many, differ = load_both(tmp_path, content, monkeypatch)
    assert one.outcome == "loaded" and one.balanced
    assert (one.rows_duplicate, one.rows_superseded_in_file) == (2, 2)
    same_outcome(one, many)
    assert differ == {}


def test_structural_fault_in_a_later_batch_restarts_record_by_record(tmp_path, monkeypatch):
    bad = 'S99,P3,"W1,2026-03-02 10:03,2026-03-02 10:07,A,RA,0.21,7.4,40,95,24\n'
    one, many, differ = load_both(tmp_path, HEADER + rows(1, 13) + bad + rows(20, 5), monkeypatch)
    assert one.rows_quarantined == 1 and one.balanced
    same_outcome(one, many)
    assert differ == {}


def test_whole_file_verdict_counts_every_batch(tmp_path, monkeypatch):
    # 30 of 31 codes unknown: the file is rejected; the one good row sits in its own batch.
    content = HEADER + rows(1, 30).replace(",RA,", ",JET,") + rows(40, 1)
    one, many, _ = load_both(tmp_path, content, monkeypatch)
    assert (one.outcome, one.reason_code) == ("rejected", "CODE_MAP_MISMATCH")
    assert "30 of 31 rows" in (one.message or "")
    same_outcome(one, many)
