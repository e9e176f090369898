"""One pipeline run: lock, open the store, load new files, record the run.

Later stages (derive, rules, audit, report) are called from here so the command line and
the nightly job use the same code path.
"""

from __future__ import annotations

import fcntl
import json
import os
import secrets
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import duckdb
import polars as pl

from pipeline import __version__
from pipeline.audit import build_audit
from pipeline.config import SiteConfig
from pipeline.derive import derive
from pipeline.errors import NoInputError, StoreBusyError
from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.log import Log
from pipeline.pseudonym import load_key
from pipeline.report import write_outputs
from pipeline.rules import Catalogue, evaluate_rules, load_catalogue
from pipeline.sql_files import run_sql
from pipeline.store import open_store

EXIT_OK = 0
EXIT_DATA_ERROR = 65  # some file was rejected; the others loaded


@dataclass
class RunResult:
    run_id: str
    files: list[FileOutcome] = field(default_factory=list)
    scope_size: int = 0
    flag_counts: dict[str, int] = field(default_factory=dict)
    missing_inputs: list[str] = field(default_factory=list)
    exit_code: int = EXIT_OK

    def total(self, name: str) -> int:
        return sum(getattr(f, name) for f in self.files if f.outcome == "loaded")

    @property
    def outcome(self) -> str:
        if self.exit_code == EXIT_OK:
            return "succeeded"
        return "completed_with_rejections"


def new_run_id() -> str:
    return datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ") + "-" + secrets.token_hex(3)


@contextmanager
def run_lock(store_path: Path) -> Iterator[None]:
    """One run at a time: a kernel lock that dies with its process, so never stale."""
    lock_path = store_path.with_name(store_path.name + ".lock")
    lock_path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
    fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o600)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 64, 0).decode(errors="replace").strip() or "unknown"
            raise StoreBusyError(f"another run is in progress (pid {holder}) on {store_path.name}; try later") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, str(os.getpid()).encode(), 0)
        yield
    finally:
        os.close(fd)


def _record_run_start(con: duckdb.DuckDBPyConnection, run_id: str, command: str, config: SiteConfig) -> None:
    con.execute(
        "insert into runs (run_id, command, started_at, outcome, code_version, duckdb_version, polars_version, "
        "config_sha256) values (?, ?, now()::timestamp, 'running', ?, ?, ?, ?)",
        [run_id, command, __version__, duckdb.__version__, pl.__version__, config.sha256],
    )


def _record_run_end(con: duckdb.DuckDBPyConnection, result: RunResult, seconds: float) -> None:
    inputs = [
        {"path": str(f.path), "size": f.size_bytes, "sha256": f.sha256, "profile": f.profile, "outcome": f.outcome}
        for f in result.files
    ]
    counts = {o: sum(1 for f in result.files if f.outcome == o) for o in ("loaded", "already_loaded", "rejected")}
    summary = (
        f"{len(result.files)} file(s): {counts['loaded']} loaded, {counts['already_loaded']} already loaded, "
        f"{counts['rejected']} rejected; {result.total('rows_in')} rows in, {result.total('rows_loaded')} loaded, "
        f"{result.total('rows_quarantined')} quarantined, {result.total('rows_duplicate')} duplicates, "
        f"{result.total('rows_superseded_in_file')} superseded in file; {seconds:.1f} s"
    )
    con.execute(
        "update runs set finished_at = now()::timestamp, outcome = ?, exit_code = ?, inputs = ?, files_seen = ?, "
        "files_loaded = ?, files_already_loaded = ?, files_rejected = ?, rows_in = ?, rows_loaded = ?, "
        "rows_quarantined = ?, rows_duplicate = ?, rows_superseded_in_file = ?, summary = ? where run_id = ?",
        [
            result.outcome,
            result.exit_code,
            json.dumps(inputs),
            len(result.files),
            counts["loaded"],
            counts["already_loaded"],
            counts["rejected"],
            result.total("rows_in"),
            result.total("rows_loaded"),
            result.total("rows_quarantined"),
            result.total("rows_duplicate"),
            result.total("rows_superseded_in_file"),
            summary,
            result.run_id,
        ],
    )


def _record_file_event(con: duckdb.DuckDBPyConnection, run_id: str, f: FileOutcome) -> None:
    con.execute(
        "insert into file_events values (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [
            run_id,
            str(f.path),
            f.sha256,
            f.profile,
            f.outcome,
            f.reason_code,
            f.message,
            f.rows_in,
            f.rows_loaded,
            f.rows_quarantined,
            f.rows_duplicate,
            f.rows_superseded_in_file,
        ],
    )


def analyse(
    con: duckdb.DuckDBPyConnection,
    config: SiteConfig,
    catalogue: Catalogue,
    result: RunResult,
    log: Log,
    *,
    rebuild: bool,
) -> None:
    """Derive metrics and evaluate rules for the samples this run touched, in one transaction."""
    con.execute("begin transaction")
    try:
        run_sql(con, "derive/00_scope.sql", run_id=result.run_id, rebuild=rebuild)
        result.scope_size = con.execute("select count(*) from scope_samples").fetchall()[0][0]
        log.info(f"deriving metrics and checking rules for {result.scope_size} samples", scope=result.scope_size)
        derive(con, catalogue, config)
        result.flag_counts = evaluate_rules(con, catalogue, result.run_id)
        con.execute("commit")
    except BaseException:
        con.execute("rollback")
        raise


def run_pipeline(
    config: SiteConfig, log: Log, *, command: str = "run", create_key: bool = False, rebuild: bool = False
) -> RunResult:
    """Load every new input file, then run the later stages; returns counts and the exit code."""
    key = load_key(config.key_file, create=create_key)
    catalogue = load_catalogue(config.thresholds)
    result = RunResult(run_id=new_run_id())
    started = time.monotonic()
    with run_lock(config.store_path):
        con = open_store(config.store_path)
        try:
            _record_run_start(con, result.run_id, command, config)
            log.info("run started", run_id=result.run_id, store=config.store_path.name)
            for source in config.inputs:
                if not source.path.exists():
                    result.missing_inputs.append(str(source.path))
                    log.error(f"input not found: {source.path}", reason="NO_INPUT")
                    continue
                files = source.files()
                for number, path in enumerate(files, start=1):
                    outcome = ingest_file(
                        con, path, source.profile, result.run_id, key, keep_patient_id=config.keep_patient_id
                    )
                    result.files.append(outcome)
                    _record_file_event(con, result.run_id, outcome)
                    _log_file(log, outcome, number, len(files))
            analyse(con, config, catalogue, result, log, rebuild=rebuild)
            build_audit(con, config, catalogue, result.run_id)
            write_outputs(con, config, result.run_id, log)
            if any(f.outcome == "rejected" for f in result.files):
                result.exit_code = EXIT_DATA_ERROR
            _record_run_end(con, result, time.monotonic() - started)
            con.execute("checkpoint")
        finally:
            con.close()
    if result.missing_inputs and not result.files:
        raise NoInputError(f"no input found: {', '.join(result.missing_inputs)}")
    return result


def _log_file(log: Log, f: FileOutcome, number: int, count: int) -> None:
    where = f"[{number}/{count}] {f.path.name}"
    if f.outcome == "rejected":
        log.error(f"{where}: rejected - {f.message}", reason=f.reason_code, file=f.path.name)
    elif f.outcome == "already_loaded":
        log.info(f"{where}: already loaded (same content), skipped", file=f.path.name)
    else:
        log.info(
            f"{where}: {f.rows_in} rows in = {f.rows_loaded} loaded + {f.rows_quarantined} quarantined + "
            f"{f.rows_duplicate} duplicate + {f.rows_superseded_in_file} superseded in file"
            + (f" ({f.corrections} corrections)" if f.corrections else ""),
            file=f.path.name,
            rows_in=f.rows_in,
            rows_loaded=f.rows_loaded,
            rows_quarantined=f.rows_quarantined,
        )
