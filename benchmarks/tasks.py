"""One benchmark measurement, run in a fresh interpreter by ``common.measure``.

Usage (internal): ``python benchmarks/tasks.py TASK 'JSON-ARGUMENTS'``. Prints one JSON
line: seconds (the operation only, after imports), rows, peak RSS of this process in
bytes, and task-specific detail.
"""

from __future__ import annotations

import json
import resource
import sys
import time
from collections import defaultdict
from collections.abc import Callable
from pathlib import Path
from typing import Any

import duckdb

TASKS: dict[str, Callable[..., dict[str, Any]]] = {}


def task(func: Callable[..., dict[str, Any]]) -> Callable[..., dict[str, Any]]:
    TASKS[func.__name__] = func
    return func


@task
def bare_load(csv: str, db: str) -> dict[str, Any]:
    """Baseline: DuckDB alone reads the CSV (its own dialect detection) into a table."""
    started = time.perf_counter()
    con = duckdb.connect(db)
    con.execute("create table export as select * from read_csv(?)", [csv])
    rows = con.execute("select count(*) from export").fetchall()[0][0]
    con.close()
    return {"seconds": time.perf_counter() - started, "rows": rows}


def _without_contract() -> None:
    """Leave the batch contract (great-expectations) out, to see ingestion's own cost."""
    import pipeline.ingest.load as load

    class Passed:
        def raise_if_rejected(self) -> None:
            return None

    load.validate_stage = lambda *args, **kwargs: Passed()  # type: ignore[assignment]
    load.keep_results = lambda *args, **kwargs: None  # type: ignore[assignment]


@task
def ingest(csv: str, db: str, profile: str, key: str, contract: bool = True) -> dict[str, Any]:
    """Our ingestion of one file into a fresh store: open, ``ingest_file``, close."""
    from pipeline.ingest.load import ingest_file
    from pipeline.profile import load_profile
    from pipeline.store import open_store

    library_seconds = 0.0
    if not contract:
        _without_contract()
    else:
        # Imported once per process, like the nightly job does before its first file: timed
        # apart, so the figure is the file's own cost (a run of 291 files pays it once).
        from pipeline.contract import import_great_expectations

        imported = time.perf_counter()
        import_great_expectations()
        library_seconds = time.perf_counter() - imported

    loaded_profile = load_profile(Path(profile))
    started = time.perf_counter()
    con = open_store(Path(db))
    outcome = ingest_file(con, Path(csv), loaded_profile, "benchmark", key.encode())
    con.close()
    seconds = time.perf_counter() - started
    if outcome.outcome != "loaded" or not outcome.balanced:
        raise SystemExit(f"ingest did not load and reconcile: {outcome}")
    return {
        "seconds": seconds,
        "rows": outcome.rows_in,
        "detail": {
            "rows_in": outcome.rows_in,
            "loaded": outcome.rows_loaded,
            "quarantined": outcome.rows_quarantined,
            "duplicates": outcome.rows_duplicate,
            "superseded_in_file": outcome.rows_superseded_in_file,
            "library_import_seconds": library_seconds,
        },
    }


class TimedConnection:
    """Delegates to a DuckDB connection and adds up the time of each statement by label."""

    def __init__(self, con: duckdb.DuckDBPyConnection) -> None:
        self._con = con
        self.current: str | None = None
        self.times: dict[str, float] = defaultdict(float)

    def _label(self, query: object, parameters: object) -> str:
        if isinstance(parameters, dict) and "rule_id" in parameters:
            return f"rule {parameters['rule_id']}"
        if self.current:
            return self.current
        lines = [ln.strip() for ln in str(query).splitlines() if ln.strip() and not ln.strip().startswith("--")]
        return (lines[0] if lines else "?")[:60]

    def execute(self, query: object, parameters: object = None) -> Any:
        label = self._label(query, parameters)
        started = time.perf_counter()
        try:
            if parameters is None:
                return self._con.execute(query)
            return self._con.execute(query, parameters)
        finally:
            self.times[label] += time.perf_counter() - started

    def sql(self, query: str, *args: Any, **kwargs: Any) -> Any:
        """Relations run lazily; the time here is building them (their use is in the stage times)."""
        label = self._label(query, None)
        started = time.perf_counter()
        try:
            return self._con.sql(query, *args, **kwargs)
        finally:
            self.times[label] += time.perf_counter() - started

    def __getattr__(self, name: str) -> Any:
        return getattr(self._con, name)


def _csv_relation(csv: str, profile: str) -> tuple[Any, list[str], tuple[str, dict[str, str], dict[str, str]]]:
    """The profile, the file's header and DuckDB's read of the file as ``ingest_file`` makes it
    (``engine.csv_relation``: the profile's dialect, every column as text)."""
    from pipeline.ingest import engine
    from pipeline.ingest.read import open_export
    from pipeline.profile import load_profile

    loaded = load_profile(Path(profile))
    header = open_export(Path(csv), loaded).header
    return loaded, header, engine.csv_relation(csv, header, loaded)


def _stage_select(csv: str, profile: str, db: str, *, all_usual: bool = False) -> tuple[Any, str, dict[str, Any]]:
    """A fresh store (macros, hard limits) and the stage 1 SELECT of ``ingest_file`` over ``csv``:
    DuckDB's parse of every cell (``engine.parse_relation``) under the kind's convert SQL.
    ``all_usual``: every cell counts as usual, i.e. without the tests that send a cell to the
    Python parser unless SQL types it exactly as that parser would."""
    from pipeline.ingest import engine
    from pipeline.ingest.load import _convert_sql, stage_parameters
    from pipeline.ingest.parse import plan_columns
    from pipeline.store import open_store

    loaded, header, (relation, refs, types) = _csv_relation(csv, profile)
    plan = plan_columns(Path(csv), header, loaded)
    select, _ = engine.parse_relation(relation, refs, types, plan, loaded, row=None, keep_cells=True)
    if all_usual:
        end = select.index(" as __usual")
        start = select.rindex(",\n    ", 0, end) + len(",\n    ")
        select = select[:start] + "true" + select[end:]
    con = open_store(Path(db))
    con.execute(f"create or replace temp view stage_input as {select}")
    convert, params = _convert_sql(con, loaded.record, stage_parameters(loaded))
    return con, convert, params


@task
def read_as_text(csv: str, db: str, profile: str) -> dict[str, Any]:
    """Reading alone: every cell of the file as text in the profile's dialect, aggregated, nothing stored."""
    from pipeline.store import open_store

    _, _, (relation, refs, _) = _csv_relation(csv, profile)
    con = open_store(Path(db))
    started = time.perf_counter()
    rows = con.execute(f"select count(*), {', '.join(f'max({r})' for r in refs.values())} from {relation}").fetchall()
    seconds = time.perf_counter() - started
    con.close()
    return {"seconds": seconds, "rows": rows[0][0]}


@task
def parse_and_convert(csv: str, db: str, profile: str, store: bool = False, all_usual: bool = False) -> dict[str, Any]:
    """The stage 1 SELECT of ``ingest_file`` (parse every cell, units, hard limits): aggregated
    (nothing stored) or, with ``store``, into the temp table ``stage_units`` as ``ingest_file``
    builds it."""
    con, convert, params = _stage_select(csv, profile, db, all_usual=all_usual)
    started = time.perf_counter()
    if store:
        con.execute(f"create or replace temp table stage_units as {convert}", params)
        rows = con.execute("select count(*) from stage_units").fetchall()[0][0]
    else:
        columns = [c[0] for c in con.execute(f"describe {convert}", params).fetchall() if c[0] != "__cells"]
        rows = con.execute(f"select count(*), {', '.join(f'max({c})' for c in columns)} from ({convert})",
                           params).fetchall()[0][0]
    seconds = time.perf_counter() - started
    con.close()
    return {"seconds": seconds, "rows": rows}


@task
def write_records(source: str, db: str, uncompressed: bool = False) -> dict[str, Any]:
    """The compressed write of a file's records: every row of ``records`` in the store ``source``
    (loaded by ``ingest_file``), held in memory, inserted in one transaction into an empty table
    of the same columns in a fresh store. ``uncompressed``: the identifier and pseudonym columns
    declared ``USING COMPRESSION uncompressed``. Also reports the table's size on disk."""
    from pipeline.schema import PSEUDONYMISED
    from pipeline.store import MEMORY_LIMIT

    plain = {"sample_id", *PSEUDONYMISED, *(key for key, _ in PSEUDONYMISED.values())}
    con = duckdb.connect(db)
    con.execute(f"set memory_limit = '{MEMORY_LIMIT}'")
    con.execute("attach ? as source (read_only)", [source])
    con.execute("create temp table held as select * from source.records")
    con.execute("detach source")
    columns = con.execute("describe held").fetchall()
    declared = ", ".join(
        f'"{name}" {kind}' + (" using compression uncompressed" if uncompressed and name in plain else "")
        for name, kind, *_ in columns
    )
    con.execute(f"create table written ({declared})")
    con.execute("checkpoint")
    started = time.perf_counter()
    con.execute("begin transaction")
    con.execute("insert into written select * from held")
    con.execute("commit")
    seconds = time.perf_counter() - started
    con.execute("checkpoint")
    blocks = con.execute("select count(distinct block_id) from pragma_storage_info('written')").fetchall()[0][0]
    block_size = con.execute("select block_size from pragma_database_size()").fetchall()[0][0]
    rows = con.execute("select count(*) from written").fetchall()[0][0]
    con.close()
    return {"seconds": seconds, "rows": rows, "detail": {"table_bytes": blocks * block_size}}


def _peak_rss() -> int:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def _instrument() -> tuple[list[TimedConnection], dict[str, float], dict[str, int]]:
    """Time stages and statements of a pipeline run (for ``--breakdown``)."""
    import pipeline.audit
    import pipeline.derive
    import pipeline.ingest.load
    import pipeline.publish
    import pipeline.report
    import pipeline.rules
    import pipeline.run
    import pipeline.sql_files

    connections: list[TimedConnection] = []
    stages: dict[str, float] = defaultdict(float)
    peaks: dict[str, int] = {}
    original_open = pipeline.run.open_store
    original_run_sql = pipeline.sql_files.run_sql

    def open_timed(*args: Any, **kwargs: Any) -> Any:
        con = TimedConnection(original_open(*args, **kwargs))
        connections.append(con)
        return con

    def run_sql_labelled(con: Any, relative_path: str, **params: object) -> None:
        previous = getattr(con, "current", None)
        if isinstance(con, TimedConnection):
            con.current = relative_path
        try:
            original_run_sql(con, relative_path, **params)
        finally:
            if isinstance(con, TimedConnection):
                con.current = previous

    def timed(name: str, func: Callable[..., Any]) -> Callable[..., Any]:
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            started = time.perf_counter()
            before = _peak_rss()
            try:
                return func(*args, **kwargs)
            finally:
                stages[name] += time.perf_counter() - started
                if _peak_rss() > before:  # this stage raised the process's peak memory
                    peaks[name] = _peak_rss()

        return wrapper

    pipeline.run.open_store = timed("open store", open_timed)
    for module in (pipeline.run, pipeline.rules, pipeline.derive, pipeline.ingest.load, pipeline.audit):
        if hasattr(module, "run_sql"):
            module.run_sql = run_sql_labelled  # type: ignore[attr-defined]
    pipeline.run.ingest_file = timed("ingest (new files)", pipeline.run.ingest_file)
    pipeline.run.analyse = timed("analyse (derive + rules)", pipeline.run.analyse)
    pipeline.run.derive = timed("  derive", pipeline.run.derive)
    pipeline.run.evaluate_rules = timed("  rules", pipeline.run.evaluate_rules)
    # each audience (pipeline/publish.py) builds its audit tables and writes its outputs
    pipeline.publish.build_audit = timed("audit tables", pipeline.publish.build_audit)
    pipeline.report.write_outputs = timed("outputs and report", pipeline.report.write_outputs)
    return connections, stages, peaks


@task
def full_run(config: str, breakdown: bool = False) -> dict[str, Any]:
    """A whole pipeline run, exactly as the nightly job does it."""
    if breakdown:
        connections, stages, peaks = _instrument()
    from pipeline.config import load_config
    from pipeline.log import Log
    from pipeline.run import run_pipeline

    site = load_config(Path(config))
    started = time.perf_counter()
    result = run_pipeline(site, Log(quiet=True))
    seconds = time.perf_counter() - started
    loaded = [f for f in result.files if f.outcome == "loaded"]
    if not loaded or not all(f.balanced for f in loaded):
        raise SystemExit(f"the run did not load and reconcile its files: {result.files}")
    detail: dict[str, Any] = {
        "rows_in": result.total("rows_in"),
        "loaded": result.total("rows_loaded"),
        "scope": result.scope_size,
        "flags": sum(result.flag_counts.values()),
    }
    if breakdown:
        detail["stages"] = {"whole run": seconds, **stages}
        detail["peaks"] = peaks  # stage -> the process's peak RSS when that stage raised it
        statements: dict[str, float] = defaultdict(float)
        for con in connections:
            for label, spent in con.times.items():
                statements[label] += spent
        detail["statements"] = dict(sorted(statements.items(), key=lambda kv: -kv[1]))
    return {"seconds": seconds, "rows": result.total("rows_in"), "detail": detail}


@task
def analyse_all(config: str) -> dict[str, Any]:
    """Derive and rules over every record of an existing store (a full rebuild of both)."""
    from pipeline.config import load_config
    from pipeline.log import Log
    from pipeline.rules import load_catalogue
    from pipeline.run import RunResult, analyse, new_run_id
    from pipeline.store import open_store

    site = load_config(Path(config))
    catalogue = load_catalogue(site.thresholds)
    result = RunResult(run_id=new_run_id())
    started = time.perf_counter()
    con = open_store(site.store_path)
    analyse(con, site, catalogue, result, Log(quiet=True), rebuild=True)
    con.execute("checkpoint")
    con.close()
    seconds = time.perf_counter() - started
    return {
        "seconds": seconds,
        "rows": result.scope_size,
        "detail": {"scope": result.scope_size, "flags": sum(result.flag_counts.values())},
    }


def main() -> None:
    name, raw = sys.argv[1], sys.argv[2]
    result = TASKS[name](**json.loads(raw))
    result["peak_rss"] = _peak_rss()
    print(json.dumps(result, default=str))


if __name__ == "__main__":
    main()
