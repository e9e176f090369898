"""Stage SQL lives in ``sql/`` files; this module finds and runs them.

Keeping SQL out of Python strings keeps it portable (the same files can run on another
SQL engine over Parquet) and reviewable on its own.
"""

from __future__ import annotations

from functools import cache
from pathlib import Path

import duckdb

SQL_DIR = Path(__file__).resolve().parent.parent / "sql"


@cache
def read_sql(relative_path: str) -> str:
    """Text of ``sql/<relative_path>``."""
    return (SQL_DIR / relative_path).read_text(encoding="utf-8")


def run_sql(con: duckdb.DuckDBPyConnection, relative_path: str, **params: object) -> None:
    """Execute every statement of a SQL file, binding the ``$name`` parameters it uses."""
    for statement in con.extract_statements(read_sql(relative_path)):
        names = statement.named_parameters
        missing = names - params.keys()
        if missing:
            raise KeyError(f"sql/{relative_path} needs parameters {sorted(missing)}")
        if names:
            con.execute(statement.query, {name: params[name] for name in names})
        else:
            con.execute(statement.query)


def install_macros(con: duckdb.DuckDBPyConnection) -> None:
    """Create (or replace) every macro in ``sql/macros/`` on this connection.

    Macros are the single home of each formula; the stages and the tests call them.
    Files are applied in name order so a later file may use an earlier one's macros.
    """
    for path in sorted((SQL_DIR / "macros").glob("*.sql")):
        con.execute(path.read_text(encoding="utf-8"))
