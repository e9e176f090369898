"""The Python face of the physiology macros, for notebooks and tests.

Every blood gas formula lives once, as a DuckDB SQL macro in ``sql/macros/`` (see
``docs/formulas.md``). This module holds no formula: it opens a connection with the
macros installed and evaluates macro expressions over columns.

>>> [round(v, 2) for v in evaluate("alveolar_po2_simplified_mmhg(fio2, paco2)", fio2=[0.21], paco2=[40.0])]
[99.73]
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import cache
from itertools import count
from typing import Any

import duckdb
import polars as pl

from pipeline.sql_files import install_macros

_frame_names = count()


def connect() -> duckdb.DuckDBPyConnection:
    """A new in-memory DuckDB connection in UTC with every macro of ``sql/macros/`` installed."""
    con = duckdb.connect(":memory:")
    con.execute("SET TimeZone='UTC'")
    install_macros(con)
    return con


@cache
def _shared_connection() -> duckdb.DuckDBPyConnection:
    return connect()


def _is_column(value: object) -> bool:
    return isinstance(value, (pl.Series, Sequence)) and not isinstance(value, (str, bytes))


def evaluate(
    sql_expression: str,
    /,
    *,
    connection: duckdb.DuckDBPyConnection | None = None,
    **columns: Any,
) -> list[Any]:
    """Evaluate one SQL expression row by row over the given columns; one result per row.

    Each keyword names a column the expression can use: a list, tuple or polars Series, or a
    scalar, which is repeated to the length of the other columns. Missing values are ``None``.
    With no columns the expression is evaluated once.

    >>> evaluate("pf_ratio(pao2, fio2)", pao2=[80.0, None], fio2=0.4)
    [200.0, None]
    """
    lengths = {len(value) for value in columns.values() if _is_column(value)}
    if len(lengths) > 1:
        raise ValueError(f"columns differ in length: {sorted(lengths)}")
    n_rows = lengths.pop() if lengths else 1
    data = [pl.Series("__row", range(n_rows), dtype=pl.UInt32)] + [
        pl.Series(name, list(value), strict=False) if _is_column(value) else pl.Series(name, [value] * n_rows)
        for name, value in columns.items()
    ]
    frame = pl.DataFrame(data)
    return evaluate_frame(frame, connection=connection, value=sql_expression).get_column("value").to_list()


def evaluate_frame(
    frame: pl.DataFrame,
    /,
    *,
    connection: duckdb.DuckDBPyConnection | None = None,
    **expressions: str,
) -> pl.DataFrame:
    """The frame with one new column per keyword, each the value of a SQL expression over its rows.

    >>> frame = pl.DataFrame({"fio2": [0.21, 1.0], "paco2": [40.0, 40.0]})
    >>> evaluate_frame(frame, pao2_max="alveolar_po2_max_mmhg(fio2, paco2)")["pao2_max"].round(2).to_list()
    [109.73, 673.0]
    """
    con = connection if connection is not None else _shared_connection()
    name = f"__physiology_input_{next(_frame_names)}"
    source = frame if "__row" in frame.columns else frame.with_row_index("__row")
    selects = ", ".join(f"{sql} AS {_quote(column)}" for column, sql in expressions.items())
    con.register(name, source)
    try:
        result = con.sql(f"SELECT * EXCLUDE (__row), {selects} FROM {name} ORDER BY __row").pl()
    finally:
        con.unregister(name)
    return result


def _quote(identifier: str) -> str:
    return '"' + identifier.replace('"', '""') + '"'
