"""One pipeline run: lock, open the store, load new files, record the run.

Later stages (derive, rules, audit, report) are called from here so the command line and
the nightly job use the same code path.
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
import platform
import secrets
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Protocol

import duckdb
import polars as pl
import pyarrow as pa

from pipeline import __version__
from pipeline.config import InputSource, SiteConfig
from pipeline.derive import derive
from pipeline.errors import NoInputError, PipelineError, StorageError, StoreBusyError
from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.log import Log
from pipeline.preflight import check_free_space, check_private_folder
from pipeline.pseudonym import key_id, load_key
from pipeline.publish import build_and_write
from pipeline.reload import warn_outdated
from pipeline.rules import Catalogue, evaluate_rules, load_catalogue
from pipeline.sql_files import SQL_DIR, run_sql
from pipeline.store import open_store
from pipeline.testhooks import pause_point

EXIT_OK = 0
EXIT_DATA_ERROR = 65  # some file was rejected; the others loaded
EXIT_NO_INPUT = 66  # no input file or folder found at all


@dataclass
class RunResult:
    run_id: str
    files: list[FileOutcome] = field(default_factory=list)
    scope_size: int = 0
    flag_counts: dict[str, int] = field(default_factory=dict)
    missing_inputs: list[str] = field(default_factory=list)
    exit_code: int = EXIT_OK
    flags_written: int = 0
    samples_flagged: int = 0
    flags_by_kind: dict[str, int] = field(default_factory=dict)  # data_quality, documentation, clinical
    duration_s: float = 0.0

    def total(self, name: str) -> int:
        return sum(getattr(f, name) for f in self.files if f.outcome == "loaded")

    @property
    def outcome(self) -> str:
        if self.exit_code == EXIT_OK:
            return "succeeded"
        if self.exit_code == EXIT_NO_INPUT:
            return "no_input"
        return "completed_with_rejections"


class FileLoader(Protocol):
    """Loads given files in place of the configured inputs (``pipeline.reload.ReloadLoader``
    for ``abg-audit reload``); the rest of the run is the same."""

    missing: list[str]  # files it was asked for that do not exist (exit 66, as for a run)
    planned: Sequence[object]  # the files it will load, once prepared

    def prepare(self, con: duckdb.DuckDBPyConnection) -> int:
        """Plan from the store before anything is written; return the bytes it will read."""
        ...

    def load(self, con: duckdb.DuckDBPyConnection, key: bytes, run_id: str, log: Log) -> Iterator[FileOutcome]:
        """Load each file (one transaction each) and yield its outcome."""
        ...


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


def _record_run_start(
    con: duckdb.DuckDBPyConnection,
    run_id: str,
    command: str,
    config: SiteConfig,
    catalogue: Catalogue,
    key: bytes,
    *,
    rebuild: bool,
) -> None:
    # This run holds the lock, so a run still marked 'running' was killed or lost power.
    con.execute("update runs set outcome = 'interrupted' where outcome = 'running'")
    con.execute(
        "insert into runs (run_id, command, started_at, outcome, code_version, duckdb_version, polars_version, "
        "config_sha256, rebuild, python_version, pyarrow_version, catalogue_version, catalogue_sha256, "
        "pseudonym_key_id) values (?, ?, now()::timestamp, 'running', ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [
            run_id,
            command,
            __version__,
            duckdb.__version__,
            pl.__version__,
            config.sha256,
            rebuild,
            platform.python_version(),
            pa.__version__,
            catalogue.version,
            catalogue.sha256,
            key_id(key),
        ],
    )


def _record_run_failure(
    con: duckdb.DuckDBPyConnection, run_id: str, exit_code: int, error: str, seconds: float
) -> None:
    """Best effort: a store that cannot take this update is marked 'interrupted' by the next run."""
    try:
        con.execute(
            "update runs set finished_at = now()::timestamp, outcome = 'failed', exit_code = ?, error = ?, "
            "duration_s = ? where run_id = ?",
            [exit_code, error, seconds, run_id],
        )
    except duckdb.Error:
        pass


def _record_run_end(con: duckdb.DuckDBPyConnection, result: RunResult, seconds: float) -> None:
    inputs = [
        {"path": str(f.path), "size": f.size_bytes, "sha256": f.sha256, "profile": f.profile, "outcome": f.outcome}
        for f in result.files
    ]
    counts = {o: sum(1 for f in result.files if f.outcome == o) for o in ("loaded", "already_loaded", "rejected")}
    kinds = {kind: result.flags_by_kind.get(kind, 0) for kind in ("data_quality", "documentation", "clinical")}
    summary = (
        f"{len(result.files)} file(s): {counts['loaded']} loaded, {counts['already_loaded']} already loaded, "
        f"{counts['rejected']} rejected; {result.total('rows_in')} rows in, {result.total('rows_loaded')} loaded, "
        f"{result.total('rows_quarantined')} quarantined, {result.total('rows_duplicate')} duplicates, "
        f"{result.total('rows_superseded_in_file')} superseded in file; {result.scope_size} samples checked, "
        f"{result.samples_flagged} with a flag; {seconds:.1f} s"
    )
    con.execute(
        "update runs set finished_at = now()::timestamp, outcome = ?, exit_code = ?, inputs = ?, files_seen = ?, "
        "files_loaded = ?, files_already_loaded = ?, files_rejected = ?, rows_in = ?, rows_loaded = ?, "
        "rows_quarantined = ?, rows_duplicate = ?, rows_superseded_in_file = ?, summary = ?, duration_s = ?, "
        "samples_in_scope = ?, flags_written = ?, samples_flagged = ?, flags_data_quality = ?, "
        "flags_documentation = ?, flags_clinical = ?, records_total = (select count(*) from records), "
        "quarantine_total = (select count(*) from quarantine), "
        "flags_total = (select count(*) from flags) where run_id = ?",
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
            seconds,
            result.scope_size,
            result.flags_written,
            result.samples_flagged,
            kinds["data_quality"],
            kinds["documentation"],
            kinds["clinical"],
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
    """Derive metrics and evaluate rules for the samples this run touched, in one transaction.

    The same transaction marks this run, and any earlier run killed before its analysis
    committed, as analysed; until then their samples stay in the next run's scope.
    """
    con.execute("begin transaction")
    try:
        run_sql(con, "derive/00_scope.sql", run_id=result.run_id, rebuild=rebuild)
        run_sql(con, "reload/30_scope.sql")  # samples a reload took out of records
        result.scope_size = con.execute("select count(*) from scope_samples").fetchall()[0][0]
        if result.scope_size == 0 and _analysis_tables_exist(con):
            log.info("no new or changed samples: derived metrics and flags left as they are", scope=0)
        else:
            log.info(f"deriving metrics and checking rules for {result.scope_size} samples", scope=result.scope_size)
            log.progress("deriving metrics")
            derive(con, catalogue, config)
            log.progress("checking rules")
            result.flag_counts = evaluate_rules(con, catalogue, result.run_id)
            result.flags_written, result.samples_flagged = con.execute(
                "select count(*), count(distinct sample_id) from flags "
                "where sample_id in (select sample_id from scope_samples)"
            ).fetchall()[0]
            result.flags_by_kind = dict(
                con.execute(
                    "select kind, count(*) from flags where sample_id in (select sample_id from scope_samples) "
                    "group by kind"
                ).fetchall()
            )
        con.execute("update runs set analysed_at = now()::timestamp where run_id in (select run_id from scope_runs)")
        pause_point("rules")
        con.execute("commit")
    except BaseException:
        con.execute("rollback")
        raise


def _analysis_tables_exist(con: duckdb.DuckDBPyConnection) -> bool:
    names = {"derived", "flags", "audit_status", "analyser_qc"}
    found = con.execute(
        "select count(*) from duckdb_tables() where not temporary and table_name in ?", [list(names)]
    ).fetchall()[0][0]
    return found == len(names)


def analysis_sha256(config: SiteConfig, catalogue: Catalogue) -> str:
    """What the derived metrics and flags depend on besides the records: the effective
    catalogue (with the site's threshold overrides), the site's pressure or altitude, its
    unit types and targets, and the stage SQL itself (a new release re-checks every sample)."""
    stage_sql = hashlib.sha256()
    for folder in ("macros", "derive", "rules"):
        for path in sorted((SQL_DIR / folder).glob("*.sql")):
            stage_sql.update(path.name.encode() + b"\0" + path.read_bytes())
    basis = {
        "catalogue": catalogue.sha256,
        "altitude_m": config.altitude_m,
        "barometric_pressure_mmhg": config.barometric_pressure_mmhg,
        "unit_targets": config.unit_target_rows(),
        "stage_sql": stage_sql.hexdigest(),
    }
    return hashlib.sha256(json.dumps(basis, sort_keys=True).encode()).hexdigest()


def _rebuild_reason(con: duckdb.DuckDBPyConnection, analysis: str) -> str | None:
    """Why every sample must be checked again although the operator did not ask for it."""
    last = con.execute(
        "select analysis_sha256 from runs where analysed_at is not null and analysis_sha256 is not null "
        "order by analysed_at desc limit 1"
    ).fetchall()
    if last and last[0][0] != analysis:
        return (
            "the rule catalogue, its thresholds, the stage SQL, the site's pressure or its unit targets changed "
            "since the last analysis"
        )
    unfinished = con.execute("select count(*) from runs where analysed_at is null and rebuild").fetchall()[0][0]
    if unfinished:
        return "an earlier full re-check did not finish"
    return None


def _known_fingerprints(con: duckdb.DuckDBPyConnection) -> dict[str, tuple[int, int, str]]:
    """Path -> (size, mtime_ns, sha256) of files whose last checked content is in the ledger."""
    rows = con.execute(
        "select source_path, size_bytes, mtime_ns, file_sha256 from file_fingerprints "
        "semi join ingested_files using (file_sha256)"
    ).fetchall()
    return {path: (size, mtime, sha) for path, size, mtime, sha in rows}


def _remember_fingerprint(con: duckdb.DuckDBPyConnection, path: Path, before: os.stat_result, sha256: str) -> None:
    """Keep the size and mtime seen *before* the file was read, so a file that grew while it
    was being read does not match next time and is read again."""
    con.execute("begin transaction")
    con.execute("delete from file_fingerprints where source_path = ?", [str(path)])
    con.execute(
        "insert into file_fingerprints values (?, ?, ?, ?, now()::timestamp)",
        [str(path), before.st_size, before.st_mtime_ns, sha256],
    )
    con.execute("commit")


def _plan_inputs(config: SiteConfig, result: RunResult, log: Log) -> list[tuple[InputSource, list[Path]]]:
    plan = []
    for source in config.inputs:
        if not source.path.exists():
            result.missing_inputs.append(str(source.path))
            log.error(f"input not found: {source.path}", reason="NO_INPUT")
            continue
        files = source.files()
        if not files:
            log.warning(f"no file in {source.path} matches {source.pattern!r}", reason="NO_MATCHING_FILE")
        plan.append((source, files))
    return plan


def _new_bytes(stats: dict[Path, os.stat_result | None], known: dict[str, tuple[int, int, str]]) -> int:
    """Bytes of the input files whose size or mtime differ from when they were last hashed."""
    return sum(
        st.st_size
        for path, st in stats.items()
        if st is not None and known.get(str(path), (None, None))[:2] != (st.st_size, st.st_mtime_ns)
    )


def _stat(path: Path) -> os.stat_result | None:
    try:
        return path.stat()
    except OSError:
        return None


def run_pipeline(
    config: SiteConfig,
    log: Log,
    *,
    command: str = "run",
    create_key: bool = False,
    rebuild: bool = False,
    loader: FileLoader | None = None,
) -> RunResult:
    """Load every new input file (or the files of ``loader``), then run the later stages;
    returns counts and the exit code."""
    key = load_key(config.key_file, create=create_key)
    catalogue = load_catalogue(config.thresholds)
    analysis = analysis_sha256(config, catalogue)
    result = RunResult(run_id=new_run_id())
    started = time.monotonic()
    old_umask = os.umask(0o077)  # the store, its WAL and spill files, the lock: owner only
    try:
        check_private_folder(config.store_path.parent, "store")
        with run_lock(config.store_path):
            plan = _plan_inputs(config, result, log) if loader is None else []
            stats = {path: _stat(path) for _, files in plan for path in files}
            if not config.store_path.exists():  # a new store: check before creating it
                if loader is not None:
                    raise StorageError(f"no store at {config.store_path}; nothing was loaded to read again")
                check_free_space(config.store_path.parent, config.output_folder, _new_bytes(stats, {}))
            con = open_store(config.store_path)
            try:
                known = {} if rebuild or loader is not None else _known_fingerprints(con)
                new_bytes = _new_bytes(stats, known) if loader is None else loader.prepare(con)
                for missing in loader.missing if loader is not None else []:
                    result.missing_inputs.append(missing)
                    log.error(f"input not found: {missing}", reason="NO_INPUT")
                store_bytes = config.store_path.stat().st_size if rebuild else 0
                check_free_space(config.store_path.parent, config.output_folder, new_bytes, store_bytes)
                reason = None if rebuild else _rebuild_reason(con, analysis)
                if reason:
                    log.warning(f"checking every sample again: {reason}")
                    rebuild = True
                _record_run_start(con, result.run_id, command, config, catalogue, key, rebuild=rebuild)
                con.execute("update runs set analysis_sha256 = ? where run_id = ?", [analysis, result.run_id])
                log.info("run started", run_id=result.run_id, store=config.store_path.name)
                try:
                    _run_stages(
                        con, config, catalogue, key, result, log, plan, stats, known, rebuild=rebuild, loader=loader
                    )
                    warn_outdated(con, config, log)
                    if any(f.outcome == "rejected" for f in result.files):
                        result.exit_code = EXIT_DATA_ERROR
                    if result.missing_inputs:
                        # An export drop that vanished must alert even when the other inputs loaded.
                        result.exit_code = EXIT_NO_INPUT
                    result.duration_s = time.monotonic() - started
                    _record_run_end(con, result, result.duration_s)
                except PipelineError as err:
                    _record_run_failure(con, result.run_id, err.exit_code, str(err), time.monotonic() - started)
                    raise
                except Exception as err:
                    # Exception texts from parsers and the database can quote cell values: keep the type only.
                    error = f"internal error ({type(err).__name__})"
                    _record_run_failure(con, result.run_id, 70, error, time.monotonic() - started)
                    raise
                pause_point("checkpoint")
                con.execute("checkpoint")
            finally:
                con.close()
    finally:
        os.umask(old_umask)
    if result.missing_inputs and not result.files:
        raise NoInputError(f"no input found: {', '.join(result.missing_inputs)}")
    return result


def _run_stages(
    con: duckdb.DuckDBPyConnection,
    config: SiteConfig,
    catalogue: Catalogue,
    key: bytes,
    result: RunResult,
    log: Log,
    plan: list[tuple[InputSource, list[Path]]],
    stats: dict[Path, os.stat_result | None],
    known: dict[str, tuple[int, int, str]],
    *,
    rebuild: bool,
    loader: FileLoader | None = None,
) -> None:
    """Load each new file (one transaction each), then analyse, audit and publish."""
    for number, outcome in enumerate(loader.load(con, key, result.run_id, log) if loader else (), start=1):
        result.files.append(outcome)
        _record_file_event(con, result.run_id, outcome)
        _log_file(log, outcome, number, len(loader.planned) if loader else 0)
    for source, files in plan:
        what = "input" if source.kind == "samples" else f"{source.kind} input"
        log.info(f"{what} {source.path} ({source.profile.name}): {len(files)} file(s)")
        for number, path in enumerate(files, start=1):
            log.progress(f"[{number}/{len(files)}] {path.name}")
            before = stats.get(path)
            seen = known.get(str(path))
            if before is not None and seen is not None and seen[:2] == (before.st_size, before.st_mtime_ns):
                # Same size and mtime as when its content hash was checked, and that content is loaded.
                outcome = FileOutcome(
                    path=path,
                    profile=source.profile.name,
                    kind=source.kind,
                    sha256=seen[2],
                    size_bytes=before.st_size,
                    outcome="already_loaded",
                )
            else:
                outcome = ingest_file(
                    con,
                    path,
                    source.profile,
                    result.run_id,
                    key,
                    keep_patient_id=config.keep_patient_id,
                    contract_settings=config.contract,
                )
                if before is not None and outcome.outcome != "rejected":
                    _remember_fingerprint(con, path, before, outcome.sha256)
            result.files.append(outcome)
            _record_file_event(con, result.run_id, outcome)
            _log_file(log, outcome, number, len(files))
        skipped = sum(1 for f in result.files[-len(files) :] if f.outcome == "already_loaded") if files else 0
        if skipped:
            log.info(f"  {skipped} file(s) already loaded (same content), skipped")
    analyse(con, config, catalogue, result, log, rebuild=rebuild)
    if not rebuild and _outputs_current(con, config, result):
        log.info("nothing new since the last completed run: audit tables and outputs are current, left as they are")
    else:
        log.progress("building audit tables")
        _remove_stale_temporaries(config.output_folder)
        build_and_write(con, config, catalogue, result.run_id, log, incremental=not rebuild)
    log.clear_progress()


def _remove_stale_temporaries(folder: Path) -> None:
    """Outputs are written as ``.<name>.<random>.tmp`` and renamed; a run killed between the
    two leaves the temporary file. Only the run holding the lock writes here, so any such
    file is left over and goes."""
    if folder.is_dir():
        for path in folder.rglob(".*.tmp"):
            if path.is_file():
                path.unlink(missing_ok=True)


def _outputs_current(con: duckdb.DuckDBPyConnection, config: SiteConfig, result: RunResult) -> bool:
    """True when this run changed nothing the audit reads and the previous run completed
    with the same configuration and code: its audit tables and outputs still hold."""
    if result.scope_size or any(f.outcome != "already_loaded" for f in result.files):
        return False
    if not config.output_folder.is_dir() or not any(config.output_folder.iterdir()):
        return False
    previous = con.execute(
        "select outcome, config_sha256, code_version, analysis_sha256, "
        "(select analysis_sha256 from runs where run_id = $run_id) "
        "from runs where run_id <> $run_id order by started_at desc limit 1",
        {"run_id": result.run_id},
    ).fetchall()
    if not previous:
        return False
    outcome, config_sha, code, analysis, current_analysis = previous[0]
    return (
        outcome in ("succeeded", "completed_with_rejections")
        and config_sha == config.sha256
        and code == __version__
        and analysis == current_analysis
    )


def _log_file(log: Log, f: FileOutcome, number: int, count: int) -> None:
    where = f"[{number}/{count}] {f.path.name}"
    if f.outcome == "rejected":
        log.error(f"{where}: rejected - {f.message}", reason=f.reason_code, file=f.path.name)
    elif f.outcome == "already_loaded":
        return  # counted once per input instead of one line per file
    else:
        rows = "rows" if f.kind == "samples" else f"{f.kind} rows"
        log.info(
            f"{where}: {f.rows_in} {rows} in = {f.rows_loaded} loaded + {f.rows_quarantined} quarantined + "
            f"{f.rows_duplicate} duplicate + {f.rows_superseded_in_file} superseded in file"
            + (f" ({f.corrections} corrections)" if f.corrections else ""),
            file=f.path.name,
            rows_in=f.rows_in,
            rows_loaded=f.rows_loaded,
            rows_quarantined=f.rows_quarantined,
        )
