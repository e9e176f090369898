"""Parse an export in SQL: DuckDB reads the file and types every usual cell; the Python
parser (``parse.py``) reads only the rows that hold an unusual one.

A cell is *usual* when SQL can type it exactly as the Python parser would, by a test that
is deliberately narrow:

* number: empty or a missing-value word, or plain digits with one optional leading minus
  and one decimal mark (``-?[0-9]+([.,][0-9]+)?``), finite;
* timestamp / date: empty or missing, or text that parses with the profile's format *and*
  prints back to the same text (``strftime(strptime(t)) = t``), and, for a local time
  zone, not in an hour that holds a clock change (the UTC offset of each hour comes from
  polars, the library the Python parser uses, so both agree on every offset);
* code, boolean, per-row unit: empty or missing, or a text the profile's map (or the
  true / false words, the unit spellings) names, compared in lower case;
* text: no white space at either end (the Python parser strips it).

Anything else (a qualifier ``>600``, a text result ``haemolysed``, a decimal comma in a
decimal-point file, a malformed date, a DST edge, an unknown code, a missing required
value, a padded cell ...) makes its row *unusual*: the row's cells go to the Python parser,
which gives the exact value, note or reason. Typically a few rows per thousand.

DuckDB reads the file once into the temp table ``stage_units`` (through the stage 1 SQL of
the record kind: units, hard limits, row checks), in file order, so a row's number is its
position (``rowid``); the text of a row's cells is kept only for unusual and quarantined
rows (``__cells``), never for the whole file. Blank records (every cell empty or white
space) are skipped in SQL as the Python reader skips them.

What DuckDB reads here: UTF-8 and Latin-1 CSV in the profile's declared dialect, every
column as text, strict (a ragged record or a stray quote is an error), and Parquet. The
Python reader (``read.py``) still reads what DuckDB cannot: a CSV with a structural fault
(it names each malformed record), a cp1252 file (DuckDB has no cp1252 decoder without an
extension we do not load), and a profile without a quote character. Its cells then go
through the same SQL (``parse_relation`` over the registered cells).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import datetime
from functools import cache

import polars as pl

from pipeline.ingest.parse import UNIT_SPELLINGS, ColumnPlan
from pipeline.profile import Profile
from pipeline.schema import UNIT_CHOICES, Kind

# Characters the Python parser strips (polars ``strip_chars``: Unicode White_Space).
WHITE_SPACE = (
    "\t\n\x0b\x0c\r \x85\xa0\u1680"
    + "".join(chr(c) for c in range(0x2000, 0x200B))
    + "\u2028\u2029\u202f\u205f\u3000"
)
_WS_CLASS = "[" + "".join(f"\\x{{{ord(c):x}}}" for c in WHITE_SPACE) + "]"
_NOT_WS_CLASS = "[^" + _WS_CLASS[1:]
# Local times are converted with offsets known for these years; a time outside them is
# left to the Python parser (such a date is a fault anyway, and the contract reports it).
_TZ_FIRST_YEAR = 1970
_TZ_YEARS_AHEAD = 5
# DuckDB SQL type of each kind of field once parsed.
SQL_TYPES: dict[Kind, str] = {
    Kind.TEXT: "varchar",
    Kind.CODE: "varchar",
    Kind.NUMBER: "double",
    Kind.TIMESTAMP: "timestamp",
    Kind.DATE: "date",
    Kind.BOOLEAN: "boolean",
}
_NUMERIC_TYPES = re.compile(r"^(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT|UTINYINT|USMALLINT|UINTEGER|UBIGINT|FLOAT|"
                            r"DOUBLE|DECIMAL.*)$")
MAX_FALLIBLE_COLUMNS = 62  # the non-blank bit mask is a BIGINT


def sql_text(value: str) -> str:
    """A SQL string literal."""
    return "'" + value.replace("'", "''") + "'"


def sql_name(value: str) -> str:
    """A SQL identifier."""
    return '"' + value.replace('"', '""') + '"'


@dataclass(frozen=True)
class CellSql:
    """SQL for one source cell: its value in the profile's unit (NULL when missing), whether
    it is usual (typed in SQL exactly as the Python parser would), whether it is non-blank."""

    value: str
    usual: str
    nonblank: str


def _missing(c: str, profile: Profile) -> str:
    # Cheap tests first (most cells are empty or longer than any missing-value word), then an
    # OR chain rather than IN (...): a constant list is planned as a join, which would lose
    # the file order the row numbers come from.
    longest = max((len(w) for w in profile.missing_values), default=0)
    words = " or ".join(f"lower({c}) = {sql_text(w)}" for w in profile.missing_values if w) or "false"
    return f"(case when {c} is null or {c} = '' then true when strlen({c}) > {longest} then false else {words} end)"


def _empty(c: str) -> str:
    """An empty cell. A missing-value word ("n/a", "-") in a cell that can fail is left to the
    Python parser, so that every usual non-empty cell of such a column has a value (the
    whole-file verdict counts non-empty cells as the values SQL gave)."""
    return f"({c} is null or {c} = '')"


def _lookup(c: str, mapping: dict[str, str]) -> str:
    if not mapping:
        return "null::varchar"
    whens = " ".join(f"when {sql_text(k)} then {sql_text(v)}" for k, v in mapping.items())
    return f"(case lower({c}) {whens} end)"


@cache
def _offset_segments(zone: str, last_year: int) -> tuple[tuple[datetime, int | None], ...]:
    """(start of local hour, UTC offset in microseconds or None) where the offset changes.

    polars (the Python parser's library) localises the first and the last microsecond of
    every hour; an hour holding a clock change (either end ambiguous or non-existent, or
    the two offsets differ) gets None, so its rows go to the Python parser.
    """
    hours = pl.datetime_range(
        datetime(_TZ_FIRST_YEAR, 1, 1), datetime(last_year + 1, 1, 1), "1h", closed="left", eager=True
    ).alias("h")
    frame = hours.to_frame()
    last = pl.col("h") + pl.duration(microseconds=3_599_999_999)

    def offset(expr: pl.Expr) -> pl.Expr:
        local = expr.dt.replace_time_zone(zone, ambiguous="null", non_existent="null")
        return (expr - local.dt.convert_time_zone("UTC").dt.replace_time_zone(None)).dt.total_microseconds()

    frame = frame.with_columns(offset(pl.col("h")).alias("a"), offset(last).alias("b"))
    frame = frame.with_columns(
        pl.when(pl.col("a") == pl.col("b")).then(pl.col("a")).otherwise(None).alias("off")
    ).select("h", "off")
    changes = frame.filter(pl.col("off").ne_missing(pl.col("off").shift(1)) | (pl.int_range(pl.len()) == 0))
    segments = [(h, off) for h, off in changes.iter_rows()]
    segments.append((datetime(last_year + 1, 1, 1), None))
    return tuple(segments)


def _offset_tree(p: str, segments: tuple[tuple[datetime, int | None], ...], lo: int, hi: int) -> str:
    """A balanced CASE over the segments lo..hi-1: about log2(n) comparisons per value."""
    if hi - lo == 1:
        off = segments[lo][1]
        return "null::bigint" if off is None else f"{off}::bigint"
    mid = (lo + hi) // 2
    left = _offset_tree(p, segments, lo, mid)
    right = _offset_tree(p, segments, mid, hi)
    return f"(case when {p} < timestamp '{segments[mid][0]:%Y-%m-%d %H:%M:%S}' then {left} else {right} end)"


def utc_offset(p: str, zone: str) -> str:
    """The UTC offset (microseconds) of the naive local timestamp expression ``p`` in
    ``zone``; NULL in an hour that holds a clock change or outside the years covered."""
    segments = _offset_segments(zone, datetime.now().year + _TZ_YEARS_AHEAD)
    first = segments[0][0]
    tree = _offset_tree(p, segments, 0, len(segments))
    return f"(case when {p} < timestamp '{first:%Y-%m-%d %H:%M:%S}' then null::bigint else {tree} end)"


def local_to_utc(p: str, offset: str, zone: str) -> tuple[str, str]:
    """(UTC value, usual) of the naive local time ``p`` whose offset column is ``offset``."""
    if zone == "UTC":
        return p, "true"
    return f"({p} - to_microseconds({offset}))", f"({offset} is not null)"


def _text_cell(c: str, profile: Profile) -> CellSql:
    padded = f"regexp_matches({c}, '^{_WS_CLASS}|{_WS_CLASS}$')"
    value = f"(case when {_missing(c, profile)} then null else {c} end)"
    return CellSql(value, f"({c} is null or not {padded})", f"({c} is not null and {c} <> '')")


def _number_cell(c: str, sql_type: str, profile: Profile) -> CellSql:
    if _NUMERIC_TYPES.match(sql_type):
        value = f"({c})::double"
        return CellSql(value, f"({c} is null or isfinite({value}))", f"({c} is not null)")
    mark = re.escape(profile.decimal_mark)
    plain = f"regexp_full_match({c}, '-?[0-9]+({mark}[0-9]+)?')"
    number = f"replace({c}, ',', '.')" if profile.decimal_mark == "," else c
    value = f"try_cast({number} as double)"
    usual = f"(case when {_empty(c)} then true when {plain} then isfinite({value}) else false end)"
    return CellSql(value, usual, f"({c} is not null and {c} <> '')")


def _timestamp_cell(c: str, sql_type: str, profile: Profile, parsed: str, offset: str) -> CellSql:
    """``parsed`` and ``offset``: the columns holding this cell's local time (``local_time``)
    and its UTC offset (``utc_offset``), computed once in inner queries because each is read
    several times."""
    if sql_type in ("TIMESTAMP WITH TIME ZONE",):
        return CellSql(f"timezone('UTC', {c})", "true", f"({c} is not null)")
    utc, in_range = local_to_utc(parsed, offset, profile.timezone)
    if sql_type.startswith("TIMESTAMP"):
        return CellSql(utc, f"({c} is null or {in_range})", f"({c} is not null)")
    fmt = sql_text(profile.datetime_format)
    usual = f"({_empty(c)} or (strftime({parsed}, {fmt}) = {c} and {in_range}))"
    return CellSql(utc, usual, f"({c} is not null and {c} <> '')")


def local_time(c: str, sql_type: str, profile: Profile) -> str:
    """The naive local time of a timestamp cell (text parsed with the profile's format)."""
    if sql_type.startswith("TIMESTAMP"):
        return f"({c})::timestamp"
    return f"try_strptime({c}, {sql_text(profile.datetime_format)})"


def _date_cell(c: str, sql_type: str, profile: Profile) -> CellSql:
    if sql_type == "DATE" or sql_type.startswith("TIMESTAMP"):
        return CellSql(f"({c})::date", "true", f"({c} is not null)")
    fmt = sql_text(profile.date_format)
    parsed = f"try_strptime({c}, {fmt})::date"
    usual = f"({_empty(c)} or strftime({parsed}, {fmt}) = {c})"
    return CellSql(parsed, usual, f"({c} is not null and {c} <> '')")


def _code_cell(c: str, canonical: str, profile: Profile) -> CellSql:
    mapped = _lookup(c, profile.codes.get(canonical, {}))
    return CellSql(mapped, f"({_empty(c)} or {mapped} is not null)", f"({c} is not null and {c} <> '')")


def _boolean_cell(c: str, sql_type: str, profile: Profile) -> CellSql:
    if sql_type == "BOOLEAN":
        return CellSql(c, "true", f"({c} is not null)")
    words = {w: "true" for w in profile.true_values} | {w: "false" for w in profile.false_values}
    value = f"(case lower({c}) " + " ".join(f"when {sql_text(k)} then {v}" for k, v in words.items()) + " end)"
    return CellSql(value, f"({_empty(c)} or {value} is not null)", f"({c} is not null and {c} <> '')")


def _unit_cell(c: str, canonical: str, profile: Profile) -> CellSql:
    family = profile.record.fields_by_name[canonical].unit_family
    assert family is not None
    allowed = {k: v for k, v in UNIT_SPELLINGS.items() if v in UNIT_CHOICES[family]}
    value = _lookup(c, allowed)
    return CellSql(value, f"({_empty(c)} or {value} is not null)", f"({c} is not null and {c} <> '')")


def cell_sql(
    canonical: str, c: str, sql_type: str, profile: Profile, parsed: str = "", offset: str = ""
) -> CellSql:
    """The SQL of one mapped cell; a typed (Parquet) column the SQL does not know how to
    read exactly is never usual, so its rows go to the Python parser."""
    kind = profile.record.fields_by_name[canonical].kind
    varchar = sql_type == "VARCHAR"
    if kind is Kind.NUMBER and (varchar or _NUMERIC_TYPES.match(sql_type)):
        return _number_cell(c, sql_type, profile)
    if kind is Kind.TIMESTAMP and (varchar or sql_type.startswith("TIMESTAMP")):
        parsed = parsed or local_time(c, sql_type, profile)
        return _timestamp_cell(c, sql_type, profile, parsed, offset or utc_offset(parsed, profile.timezone))
    if kind is Kind.DATE and (varchar or sql_type == "DATE" or sql_type.startswith("TIMESTAMP")):
        return _date_cell(c, sql_type, profile)
    if kind is Kind.BOOLEAN and (varchar or sql_type == "BOOLEAN"):
        return _boolean_cell(c, sql_type, profile)
    if kind is Kind.CODE and varchar:
        return _code_cell(c, canonical, profile)
    if kind is Kind.TEXT and varchar:
        return _text_cell(c, profile)
    return CellSql(f"null::{SQL_TYPES[kind]}", "false", f"({c} is not null)")


def parse_relation(
    relation: str,
    refs: dict[str, str],
    types: dict[str, str],
    plan: ColumnPlan,
    profile: Profile,
    *,
    row: str | None,
    keep_cells: bool,
) -> tuple[str, list[str]]:
    """The SELECT that parses every record of ``relation`` into the columns stage 1 SQL
    reads (``stage_input``), and the per-row unit columns in the order of the non-blank bit
    mask (``__nonblank``).

    ``refs``: source header -> SQL expression of its cell in ``relation`` (every header of
    the file, in order); ``types``: source header -> DuckDB type. ``row``: the expression of
    the record number, or None when it is the position in the file (``rowid`` + 1, set
    afterwards). ``keep_cells``: build ``__cells`` (the row's cells as text) for rows that
    need them; Parquet rows are read again from the file instead.
    """
    record = profile.record
    headers = list(refs)
    cells: dict[str, CellSql] = {}
    inner: list[str] = []
    offsets: list[str] = []
    for canonical, source in plan.mapped.items():
        parsed = offset = ""
        if record.fields_by_name[canonical].kind is Kind.TIMESTAMP:
            parsed, offset = f"__local_{len(inner)}", f"__offset_{len(inner)}"
            inner.append(f"{local_time(refs[source], types[source], profile)} as {parsed}")
            offsets.append(f"{utc_offset(parsed, profile.timezone)} as {offset}")
        cells[canonical] = cell_sql(canonical, refs[source], types[source], profile, parsed, offset)
    units = {
        canonical: _unit_cell(refs[source], canonical, profile) if types[source] == "VARCHAR"
        else CellSql("null::varchar", "false", f"({refs[source]} is not null)")
        for canonical, source in plan.unit_sources.items()
    }
    unit_sources = list(dict.fromkeys(plan.unit_sources.values()))
    if len(unit_sources) > MAX_FALLIBLE_COLUMNS:
        raise ValueError(f"more than {MAX_FALLIBLE_COLUMNS} unit columns in one profile")

    usual = [cell.usual for cell in [*cells.values(), *units.values()]]
    usual += [f"({cells[f].value} is not null)" for f in record.required]
    out = [f"{row} as __row" if row else "null::bigint as __row"]
    for field in record.fields:
        value = cells[field.name].value if field.name in cells else "null"
        out.append(f"cast({value} as {SQL_TYPES[field.kind]}) as {field.name}")
    for name in record.unit_fields:
        unit = units[name].value if name in units else "null::varchar"
        out.append(f"{unit} as {name}__unit")
    out.append("'reported' as __status")
    out.append("null::varchar as __reason")
    out.append("null::varchar as __failed")
    out.append(f"({' and '.join(usual) or 'true'}) as __usual")
    if keep_cells:
        out.append("[" + ", ".join(f"coalesce(({refs[h]})::varchar, '')" for h in headers) + "] as __cells")
    else:
        out.append("null::varchar[] as __cells")
    # Non-empty cells of per-row unit columns, one bit each (their values are not kept).
    nonblank = {plan.unit_sources[c]: cell.nonblank for c, cell in units.items()}
    bits = [f"(case when {nonblank[s]} then {1 << i} else 0 end)" for i, s in enumerate(unit_sources)]
    out.append(f"({' + '.join(bits) or '0'})::bigint as __nonblank")
    # A record has some cell with a character that is not white space. As a chain of ORs
    # DuckDB stops at the first such cell, usually the first column; the same test written
    # as "not (every cell blank)" tested every cell of every row (1.6 s of 6.8 s at 1 M rows).
    where = "where " + " or ".join(f"regexp_matches(({refs[h]})::varchar, '{_NOT_WS_CLASS}')" for h in headers)
    source = relation
    if inner:
        source = f"(select *, {', '.join(offsets)} from (select *, {', '.join(inner)} from {relation}))"
    select = "select\n    " + ",\n    ".join(out) + f"\nfrom {source}\n{where}"
    return select, unit_sources


def csv_relation(path: str, header: list[str], profile: Profile) -> tuple[str, dict[str, str], dict[str, str]]:
    """DuckDB's reader for a CSV export in the profile's dialect, every column as text.

    Columns get positional names (c0, c1, ...): headers are matched ignoring case by the
    profile, and DuckDB's own names are case-insensitive too.
    """
    names = [f"c{i}" for i in range(len(header))]
    columns = "{" + ", ".join(f"{sql_text(n)}: 'VARCHAR'" for n in names) + "}"
    encoding = "latin-1" if profile.encoding == "latin-1" else "utf-8"
    quote = sql_text(profile.quote_char)
    relation = (
        f"read_csv({sql_text(path)}, columns = {columns}, header = true, auto_detect = false, "
        f"delim = {sql_text(profile.delimiter)}, quote = {quote}, escape = {quote}, strict_mode = true, "
        f"null_padding = false, allow_quoted_nulls = false, encoding = {sql_text(encoding)}, parallel = true)"
    )
    refs = {h: n for h, n in zip(header, names, strict=True)}
    return relation, refs, dict.fromkeys(header, "VARCHAR")


def duckdb_reads(profile: Profile) -> bool:
    """Whether DuckDB can read this profile's CSV exports itself (see the module docstring)."""
    return profile.format == "csv" and profile.encoding in ("utf-8", "latin-1") and len(profile.quote_char) == 1 and (
        profile.quote_char != profile.delimiter
    )


__all__ = ["CellSql", "cell_sql", "csv_relation", "duckdb_reads", "local_to_utc", "parse_relation", "sql_name"]
