"""Compare two engines' outputs of the same lake: rows by key, values exactly or to a tolerance.

Text, flags, codes and counts must be equal. Floating-point values may differ in the last bits
(the engines add and multiply in different orders): equal when within ``TOLERANCE`` (absolute for
values up to 1, relative above). Evidence is JSON whose numbers follow the same rule, compared
parsed (key order is not meaningful in a JSON object).
"""

from __future__ import annotations

import json
import math
from typing import Any

import polars as pl

TOLERANCE = 1e-9
KEYS: dict[str, tuple[str, ...]] = {
    "derived": ("site", "sample_id"),
    "flags": ("site", "sample_id", "rule_id"),
    "audit_status": ("site", "sample_id"),
    "analyser_qc": ("site", "analyser_id", "analyte", "block"),
    "audit_unit_period_counts": ("site", "unit", "period_start"),
    "audit_unit_period_flags": ("site", "unit", "period_start", "rule_id"),
    "audit_unit_period_patients": ("site", "unit", "period_start", "patient_key"),
    "audit_unit_period_age_bands": ("site", "unit", "period_start", "age_band"),
    "audit_unit_period_episodes": ("site", "unit", "period_start"),
}
IGNORED = {"run_id"}


def close(a: float | None, b: float | None) -> bool:
    if a is None or b is None:
        return a is None and b is None
    if math.isnan(a) or math.isnan(b):
        return math.isnan(a) and math.isnan(b)
    return abs(a - b) <= TOLERANCE * max(1.0, abs(a), abs(b))


def same_json(a: Any, b: Any) -> bool:
    if isinstance(a, float) or isinstance(b, float):
        return isinstance(a, (int, float)) and isinstance(b, (int, float)) and close(float(a), float(b))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(same_json(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(same_json(x, y) for x, y in zip(a, b, strict=True))
    return a == b


def differences(table: str, reference: pl.DataFrame, other: pl.DataFrame, limit: int = 20) -> list[str]:
    """What differs between two outputs of ``table`` (empty when they agree). Columns are compared
    whole (polars); only rows whose evidence text differs are parsed as JSON."""
    keys = list(KEYS[table])
    problems: list[str] = []
    if set(reference.columns) != set(other.columns):
        return [f"{table}: columns differ: {sorted(set(reference.columns) ^ set(other.columns))}"]
    if reference.height != other.height:
        problems.append(f"{table}: {reference.height} rows against {other.height}")
    joined = reference.join(other, on=keys, how="full", suffix="__other", coalesce=True, nulls_equal=True)
    for column in (c for c in reference.columns if c not in keys and c not in IGNORED):
        a, b = pl.col(column), pl.col(f"{column}__other")
        if reference.schema[column].is_float():
            scale = pl.max_horizontal(pl.lit(1.0), a.abs(), b.abs())
            same = ((a - b).abs() <= TOLERANCE * scale) | (a.is_null() & b.is_null()) | (a.is_nan() & b.is_nan())
            differing = joined.filter(~same.fill_null(False))
        else:
            differing = joined.filter(a.ne_missing(b))
        for row in differing.select(*keys, column, f"{column}__other").iter_rows():
            *key, left, right = row
            if _equal(column, reference.schema[column], left, right):
                continue
            problems.append(f"{table} {tuple(key)} {column}: {left!r} against {right!r}")
            if len(problems) >= limit:
                return problems
    return problems


def _equal(column: str, dtype: pl.DataType, a: Any, b: Any) -> bool:
    if dtype.is_float():
        return close(a, b)
    if column == "evidence" and a is not None and b is not None:
        return same_json(json.loads(a), json.loads(b))
    return a == b


def published_differences(table: str, reference: pl.DataFrame, other: pl.DataFrame, limit: int = 20) -> list[str]:
    """What differs between two engines' (or a site's and the network's) published ``table``: the rows
    as a whole, in no particular order (published tables have no single key), numbers to ``TOLERANCE``.
    Rows are put in order by every column (floats last, where the last bits may differ) and compared."""
    if set(reference.columns) != set(other.columns):
        return [f"{table}: columns differ: {sorted(set(reference.columns) ^ set(other.columns))}"]
    if reference.height != other.height:
        return [f"{table}: {reference.height} rows against {other.height}"]
    floats = [c for c in reference.columns if reference.schema[c].is_float()]
    order = [c for c in reference.columns if c not in floats] + floats
    a = reference.sort(order, nulls_last=True)
    b = other.select(reference.columns).cast(dict(reference.schema), strict=False).sort(order, nulls_last=True)
    problems: list[str] = []
    for column in reference.columns:
        left, right = a[column], b[column]
        if column in floats:
            scale = pl.max_horizontal(pl.lit(1.0), pl.col("a").abs(), pl.col("b").abs())
            same = pl.DataFrame({"a": left, "b": right}).select(
                ((pl.col("a") - pl.col("b")).abs() <= TOLERANCE * scale)
                | (pl.col("a").is_null() & pl.col("b").is_null())
                | (pl.col("a").is_nan() & pl.col("b").is_nan())
            )
            differing = (~same.to_series().fill_null(False)).arg_true().to_list()
        else:
            differing = left.ne_missing(right).arg_true().to_list()
        for row in differing[:limit]:
            problems.append(f"{table} row {row} {column}: {left[row]!r} against {right[row]!r}")
        if len(problems) >= limit:
            break
    return problems[:limit]
