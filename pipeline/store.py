"""The embedded DuckDB store: opening it safely and creating its tables."""

from __future__ import annotations

import os
import re
from pathlib import Path

import duckdb
import polars as pl

from pipeline.errors import StorageError, StoreBusyError
from pipeline.schema import FIELDS
from pipeline.sql_files import SQL_DIR, install_macros

_LOCK_PATTERN = re.compile(r"Could not set lock on file .*?\(PID (\d+)\)", re.DOTALL)
# DuckDB's own budget; beyond it, staging and big intermediate results spill to the
# store's temp folder. The rest of a run (Python, polars batches) stays within ~1 GiB,
# so a run over millions of records peaks near 2 GiB (benchmarks/README.md).
MEMORY_LIMIT = "1GB"


def open_store(path: Path, *, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    """Open (creating if needed) the store, with UTC sessions, offline settings and macros."""
    path = Path(path)
    if not read_only:
        try:
            path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        except OSError as err:
            raise StorageError(f"cannot create the store folder {path.parent}: {err.strerror}") from None
    elif not path.exists():
        raise StorageError(f"no store at {path}; run the pipeline first")
    old_umask = os.umask(0o077)  # the store, its WAL and spill files hold identifiers: owner only
    try:
        con = duckdb.connect(str(path), read_only=read_only)
    except duckdb.IOException as err:
        match = _LOCK_PATTERN.search(str(err))
        if match:
            raise StoreBusyError(
                f"the store {path.name} is in use by another process (pid {match.group(1)}); "
                "close it (notebooks and dashboards hold the file too) and retry"
            ) from None
        raise StorageError(f"cannot open the store {path}: {err}") from None
    finally:
        os.umask(old_umask)
    _prepare(con, None if read_only else path.with_name(path.name + ".tmp"))
    return con


def open_scratch_store(spill: Path) -> duckdb.DuckDBPyConnection:
    """An in-memory store with the tables and macros of a real one, for trying a profile on
    export files (``abg-audit check-profile``): what it loads is gone when it is closed;
    only spill files, if any, go to ``spill`` (a temporary folder the caller removes)."""
    con = duckdb.connect()
    _prepare(con, spill)
    return con


def session_settings(con: duckdb.DuckDBPyConnection, memory_limit: str, spill: Path | None) -> None:
    """Settings every DuckDB connection of ours runs with (the store's and the network run's
    engine): UTC sessions, offline (no extension installed or loaded on its own), the memory
    budget and, with ``spill``, an owner-only spill folder."""
    con.execute("set TimeZone = 'UTC'")
    con.execute("set autoinstall_known_extensions = false")
    con.execute("set autoload_known_extensions = false")
    con.execute(f"set memory_limit = '{memory_limit}'")
    if spill is not None:
        # Spill files hold identifiers (or pseudonymised rows) too: DuckDB creates them long
        # after any umask of the caller is restored, so their folder is made owner-only here.
        spill.mkdir(mode=0o700, exist_ok=True)
        spill.chmod(0o700)
        con.execute("set temp_directory = ?", [str(spill)])


def _prepare(con: duckdb.DuckDBPyConnection, spill: Path | None) -> None:
    """Session settings, macros; with ``spill`` (a writable store) the spill folder and the tables."""
    session_settings(con, MEMORY_LIMIT, spill)
    install_macros(con)
    if spill is not None:
        for ddl in sorted((SQL_DIR / "schema").glob("*.sql")):
            con.execute(ddl.read_text(encoding="utf-8"))
    _install_field_limits(con)


def _install_field_limits(con: duckdb.DuckDBPyConnection) -> None:
    """Hard limits from the canonical catalogue, as a temp table the ingest SQL joins."""
    limits = pl.DataFrame(
        [(f.name, f.hard_min, f.hard_max) for f in FIELDS if f.hard_min is not None],
        schema={"field": pl.String, "hard_min": pl.Float64, "hard_max": pl.Float64},
        orient="row",
    )
    con.register("field_limits_frame", limits)
    con.execute("create or replace temp table field_limits as select * from field_limits_frame")
    con.unregister("field_limits_frame")
