"""Patient-based analyser QC is kept incrementally: after any sequence of nightly loads -
results arriving late, corrections that move a result in time or change its value, ties
in collection time, venous and empty results - the blocks, limits and signals equal those
of a full recomputation over the whole store.
"""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path
from typing import Any

import duckdb
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.sql_files import run_sql
from pipeline.store import open_store
from tests.rule_harness import T0, insert_records, record

BLOCK = 5
PARAMS = {"block_size": BLOCK, "limit_sigma": 2.0}

results = st.fixed_dictionaries(
    {
        "id": st.integers(0, 9999),  # sample ids in any order relative to collection times
        "analyser": st.sampled_from(["AN1", "AN1", "AN2", None]),
        "minute": st.integers(0, 90),  # narrow: many ties in collection time
        "paco2": st.sampled_from([None, 40.0, 41.0, 44.0]) | st.floats(25, 60),
        "ph": st.sampled_from([None, 7.4]) | st.floats(7.2, 7.6),
        "arterial": st.sampled_from([True, True, True, False]),
    }
)
nights = st.lists(
    st.tuples(st.lists(results, max_size=40), st.lists(st.tuples(st.integers(0, 10**6), results), max_size=6)),
    min_size=2,
    max_size=5,
)


def as_record(sample_id: str, r: dict[str, Any]) -> dict[str, Any]:
    return record(
        sample_id,
        patient_id=sample_id,
        analyser_id=r["analyser"],
        collected_at=T0 + timedelta(minutes=r["minute"]),
        paco2_mmhg=r["paco2"],
        ph=r["ph"],
        sample_type="arterial" if r["arterial"] else "venous",
    )


def new_run(con: duckdb.DuckDBPyConnection, run_id: str) -> None:
    con.execute("insert into runs (run_id, started_at, outcome) values (?, now()::timestamp, 'running')", [run_id])


def evaluate_qc(con: duckdb.DuckDBPyConnection, run_id: str, *, rebuild: bool) -> list[tuple[Any, ...]]:
    run_sql(con, "derive/00_scope.sql", run_id=run_id, rebuild=rebuild)
    run_sql(con, "rules/analyser_patient_median_shift.sql", **PARAMS)
    con.execute("update runs set analysed_at = now()::timestamp where run_id in (select run_id from scope_runs)")
    return con.execute(
        "select analyser_id, analyte, block, first_collected_at, last_collected_at, round(block_median, 9), "
        "round(lower_limit, 9), round(upper_limit, 9), signal from analyser_qc order by all"
    ).fetchall()


@settings(max_examples=25, deadline=None)
@given(history=nights)
def test_incremental_blocks_equal_a_full_recomputation(history) -> None:
    con = open_store(Path(":memory:"))
    try:
        used: set[int] = set()
        for night, (new, corrections) in enumerate(history):
            run_id = f"n{night}"
            new_run(con, run_id)
            held = [r[0] for r in con.execute("select sample_id from records order by sample_id").fetchall()]
            for pick, changed in corrections if held else []:
                sample_id = held[pick % len(held)]
                con.execute(
                    "insert into superseded_records by name select *, 'later.csv' as superseded_by_file, "
                    "1 as superseded_by_row, ? as superseded_in_run from records where sample_id = ?",
                    [run_id, sample_id],
                )
                con.execute("delete from records where sample_id = ?", [sample_id])
                insert_records(con, [as_record(sample_id, changed)], run_id=run_id)
            rows = []
            for r in new:
                if r["id"] in used:
                    continue
                used.add(r["id"])
                rows.append(as_record(f"S{r['id']:04d}", r))
            if rows:
                insert_records(con, rows, run_id=run_id)
            incremental = evaluate_qc(con, run_id, rebuild=False)
            con.execute("begin transaction")
            full = evaluate_qc(con, run_id, rebuild=True)
            con.execute("rollback")
            assert incremental == full
    finally:
        con.close()


def test_a_night_with_later_results_keeps_every_earlier_block(tmp_path):
    con = open_store(tmp_path / "store.duckdb")
    new_run(con, "n0")
    first = [record(f"A{i:03d}", collected_at=T0 + timedelta(minutes=i), paco2_mmhg=40.0 + i % 3) for i in range(52)]
    insert_records(con, first, run_id="n0")
    before = evaluate_qc(con, "n0", rebuild=False)
    assert len([b for b in before if b[1] == "paco2_mmhg"]) == 10  # 52 results: 10 complete blocks
    con.execute("create table kept as select * from analyser_qc_blocks")
    new_run(con, "n1")
    later = [record(f"B{i:03d}", collected_at=T0 + timedelta(minutes=100 + i)) for i in range(8)]
    insert_records(con, later, run_id="n1")
    after = evaluate_qc(con, "n1", rebuild=False)
    assert len([b for b in after if b[1] == "paco2_mmhg"]) == 12  # 60 results
    untouched = con.execute(
        "select count(*) from kept join analyser_qc_blocks using "
        "(analyser_id, analyte, block, first_sample_id, last_sample_id, block_median)"
    ).fetchall()[0][0]
    assert untouched == con.execute("select count(*) from kept").fetchall()[0][0] == 20  # 10 PaCO2 + 10 pH
    con.close()


def test_late_result_tied_in_time_with_a_block_end_renumbers_that_block(tmp_path):
    # Block 0 ends with S14 at minute 4; a later night brings S05, also at minute 4, which
    # sorts before S14 (same time, smaller id): it belongs to block 0 and pushes S14 out.
    con = open_store(tmp_path / "store.duckdb")
    new_run(con, "n0")
    first = [record(f"S{10 + i}", collected_at=T0 + timedelta(minutes=i), paco2_mmhg=40.0 + i) for i in range(5)]
    insert_records(con, first, run_id="n0")
    assert [row[5] for row in evaluate_qc(con, "n0", rebuild=False) if row[1] == "paco2_mmhg"] == [42.0]
    new_run(con, "n1")
    insert_records(con, [record("S05", collected_at=T0 + timedelta(minutes=4), paco2_mmhg=30.0)], run_id="n1")
    blocks = evaluate_qc(con, "n1", rebuild=False)
    assert [row[5] for row in blocks if row[1] == "paco2_mmhg"] == [41.0]  # 40, 41, 42, 43 and 30
    con.close()
