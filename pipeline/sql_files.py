"""Stage SQL lives in ``sql/`` files; this module finds and runs them.

Keeping SQL out of Python strings keeps it portable (the same files can run on another
SQL engine over Parquet) and reviewable on its own.
"""

from __future__ import annotations

from collections.abc import Mapping
from functools import cache
from pathlib import Path

import duckdb

SQL_DIR = Path(__file__).resolve().parent.parent / "sql"


@cache
def read_sql(relative_path: str) -> str:
    """Text of ``sql/<relative_path>``."""
    return (SQL_DIR / relative_path).read_text(encoding="utf-8")


def run_sql(
    con: duckdb.DuckDBPyConnection, relative_path: str, *, sql_names: Mapping[str, str] | None = None, **params: object
) -> None:
    """Execute every statement of a SQL file, binding the ``$name`` parameters it uses.

    ``sql_names`` fill the ``{name}`` placeholders of a file shared by several record kinds
    (table and column names, which cannot be query parameters; pipeline/schema.py
    RecordSpec.sql_names)."""
    text = read_sql(relative_path)
    if sql_names is not None:
        text = text.format_map(sql_names)
    for statement in con.extract_statements(text):
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
