"""Turn the text cells of one export into typed canonical values, cell by cell.

Each cell either parses, is missing, or fails with a stable reason code. A numeric cell
may carry a qualifier (``>600`` keeps 600 and the comparator ``>``) or a recognised text
result (``haemolysed``): the value is then NULL and the text is kept as a result status.
Values stay in the unit the profile declares; conversion to canonical units happens in
SQL (``sql/ingest/``) with the unit macros, so each conversion factor has one home.

The profile's record kind (``profile.record``: samples or prescriptions) gives the field
catalogue and the required fields; everything else here is the same for every kind.

A column where every non-empty cell fails (wrong date format, wrong decimal mark, an
unmapped code list) is a fault of the whole file: ``FileRejected``, one message.
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from functools import partial
from pathlib import Path

import polars as pl

from pipeline.errors import FileRejected
from pipeline.ingest.read import ROW, RawExport
from pipeline.profile import Profile
from pipeline.schema import UNIT_CHOICES, Kind

REASON = "__reason"
FAILED = "__failed"
STATUS = "__status"
UNIT_SUFFIX = "__unit"

# Text results that analysers and laboratory systems put where a number should be. Their
# rates are quality measures, so they are kept as a status instead of being quarantined.
TEXT_RESULTS: dict[str, str] = {
    "haemolysed": "haemolysed",
    "hemolysed": "haemolysed",
    "hemolyzed": "haemolysed",
    "haemolyzed": "haemolysed",
    "haemolysis": "haemolysed",
    "hemolysis": "haemolysed",
    "clotted": "clotted",
    "clot": "clotted",
    "clotted sample": "clotted",
    "cancelled": "cancelled",
    "canceled": "cancelled",
    "see comment": "see_comment",
    "see comments": "see_comment",
    "see note": "see_comment",
    "qns": "insufficient_sample",
    "insufficient sample": "insufficient_sample",
    "insufficient": "insufficient_sample",
}
NON_FINITE = ("nan", "inf", "+inf", "-inf", "infinity", "-infinity", "+infinity")
# Unit spellings seen in per-row unit columns, mapped to the profile vocabulary.
UNIT_SPELLINGS: dict[str, str] = {
    "mmhg": "mmHg",
    "torr": "mmHg",
    "kpa": "kPa",
    "%": "percent",
    "percent": "percent",
    "pct": "percent",
    "fraction": "fraction",
    "frac": "fraction",
    "c": "C",
    "°c": "C",
    "degc": "C",
    "f": "F",
    "°f": "F",
    "degf": "F",
    "g/dl": "g/dL",
    "g/l": "g/L",
    "mmol/l": "mmol/L",
    "mg/dl": "mg/dL",
}
SYSTEMATIC_MIN_CELLS = 3
SYSTEMATIC_SHARE = 0.95
SYSTEMATIC_MIN_CELLS_FOR_SHARE = 20
_VALUE = "__value"  # the distinct texts of one column while they are parsed
# Nearly every cell differs: parsed cell by cell.
_IDENTIFIERS = frozenset({"sample_id", "patient_id", "prescription_id", "encounter_id"})
FILE_REASON_FOR_CELL_REASON = {
    "DATE_UNPARSEABLE": "DATE_FORMAT_MISMATCH",
    "NUMBER_FORMAT": "DIALECT_MISMATCH",
    "NOT_A_NUMBER": "COLUMN_NOT_NUMERIC",
    "UNKNOWN_CODE": "CODE_MAP_MISMATCH",
    "UNIT_UNKNOWN": "UNIT_COLUMN_MISMATCH",
    "INVALID_BOOLEAN": "CODE_MAP_MISMATCH",
}


@dataclass
class ParsedExport:
    """Typed cells of one export: ``values`` has one row per record (failures included)."""

    values: pl.DataFrame
    notes: pl.DataFrame  # ROW, field, comparator, result_status, original_text
    mapped: dict[str, str]  # canonical field -> source header present in the file
    missing_optional: list[str]
    extra_columns: list[str]


def _number_pattern(decimal_mark: str) -> str:
    mark = re.escape(decimal_mark)
    return rf"^(<=|>=|<|>)?\s*([+-]?(?:\d+(?:{mark}\d*)?|{mark}\d+)(?:[eE][+-]?\d+)?)$"


def _missing(text: pl.Expr, profile: Profile) -> pl.Expr:
    return text.is_null() | text.str.to_lowercase().is_in(list(profile.missing_values))


def _number(name: str, source: pl.Expr, dtype: pl.DataType, profile: Profile) -> list[pl.Expr]:
    if dtype.is_numeric():
        value = source.cast(pl.Float64)
        bad = value.is_nan() | value.is_infinite()
        return [
            pl.when(bad).then(None).otherwise(value).alias(name),
            pl.when(bad).then(pl.lit("NON_FINITE")).alias(f"{name}__fail"),
            pl.lit(None, dtype=pl.String).alias(f"{name}__cmp"),
            pl.lit(None, dtype=pl.String).alias(f"{name}__status"),
        ]
    text = source.cast(pl.String).str.strip_chars()
    lowered = text.str.to_lowercase().str.strip_chars(" .!")
    groups = text.str.extract_groups(_number_pattern(profile.decimal_mark))
    digits = groups.struct.field("2")
    value = digits.str.replace(",", ".", literal=True).cast(pl.Float64, strict=False)
    status = lowered.replace_strict(TEXT_RESULTS, default=None, return_dtype=pl.String)
    other_mark = "," if profile.decimal_mark == "." else "."
    wrong_mark = text.str.contains(_number_pattern(other_mark))
    fail = (
        pl.when(_missing(text, profile) | status.is_not_null() | value.is_not_null())
        .then(None)
        .when(lowered.is_in(list(NON_FINITE)))
        .then(pl.lit("NON_FINITE"))
        .when(wrong_mark)
        .then(pl.lit("NUMBER_FORMAT"))
        .otherwise(pl.lit("NOT_A_NUMBER"))
    )
    return [
        value.alias(name),
        fail.alias(f"{name}__fail"),
        groups.struct.field("1").alias(f"{name}__cmp"),
        status.alias(f"{name}__status"),
    ]


def _timestamp(name: str, source: pl.Expr, dtype: pl.DataType, profile: Profile, fmt: str) -> list[pl.Expr]:
    if isinstance(dtype, pl.Datetime):
        naive = source if dtype.time_zone is None else source.dt.convert_time_zone("UTC").dt.replace_time_zone(None)
        if dtype.time_zone is None and profile.timezone != "UTC":
            local = naive.dt.replace_time_zone(profile.timezone, ambiguous="null", non_existent="null")
            naive = local.dt.convert_time_zone("UTC").dt.replace_time_zone(None)
        return [naive.cast(pl.Datetime("us")).alias(name), pl.lit(None, dtype=pl.String).alias(f"{name}__fail")]
    text = source.cast(pl.String).str.strip_chars()
    parsed = text.str.strptime(pl.Datetime("us"), fmt, strict=False)
    if profile.timezone == "UTC":
        utc = parsed
        fail = pl.when(_missing(text, profile)).then(None).when(parsed.is_null()).then(pl.lit("DATE_UNPARSEABLE"))
    else:
        local = parsed.dt.replace_time_zone(profile.timezone, ambiguous="null", non_existent="null")
        earliest = parsed.dt.replace_time_zone(profile.timezone, ambiguous="earliest", non_existent="null")
        utc = local.dt.convert_time_zone("UTC").dt.replace_time_zone(None)
        fail = (
            pl.when(_missing(text, profile))
            .then(None)
            .when(parsed.is_null())
            .then(pl.lit("DATE_UNPARSEABLE"))
            .when(local.is_null() & earliest.is_not_null())
            .then(pl.lit("DST_AMBIGUOUS"))
            .when(local.is_null())
            .then(pl.lit("DST_NONEXISTENT"))
        )
    return [utc.alias(name), fail.alias(f"{name}__fail")]


def _date(name: str, source: pl.Expr, dtype: pl.DataType, profile: Profile) -> list[pl.Expr]:
    if isinstance(dtype, (pl.Date, pl.Datetime)):
        return [source.cast(pl.Date).alias(name), pl.lit(None, dtype=pl.String).alias(f"{name}__fail")]
    text = source.cast(pl.String).str.strip_chars()
    parsed = text.str.strptime(pl.Date, profile.date_format, strict=False)
    fail = pl.when(_missing(text, profile)).then(None).when(parsed.is_null()).then(pl.lit("DATE_UNPARSEABLE"))
    return [parsed.alias(name), fail.alias(f"{name}__fail")]


def _code(name: str, source: pl.Expr, profile: Profile) -> list[pl.Expr]:
    codes = profile.codes.get(name, {})
    text = source.cast(pl.String).str.strip_chars()
    mapped = text.str.to_lowercase().replace_strict(codes, default=None, return_dtype=pl.String)
    fail = pl.when(_missing(text, profile)).then(None).when(mapped.is_null()).then(pl.lit("UNKNOWN_CODE"))
    return [mapped.alias(name), fail.alias(f"{name}__fail")]


def _boolean(name: str, source: pl.Expr, dtype: pl.DataType, profile: Profile) -> list[pl.Expr]:
    if dtype == pl.Boolean:
        return [source.alias(name), pl.lit(None, dtype=pl.String).alias(f"{name}__fail")]
    text = source.cast(pl.String).str.strip_chars().str.to_lowercase()
    value = (
        pl.when(text.is_in(list(profile.true_values)))
        .then(True)
        .when(text.is_in(list(profile.false_values)))
        .then(False)
    )
    fail = pl.when(_missing(text, profile) | value.is_not_null()).then(None).otherwise(pl.lit("INVALID_BOOLEAN"))
    return [value.alias(name), fail.alias(f"{name}__fail")]


def _text(name: str, source: pl.Expr, profile: Profile) -> list[pl.Expr]:
    text = source.cast(pl.String).str.strip_chars()
    return [
        pl.when(_missing(text, profile)).then(None).otherwise(text).alias(name),
        pl.lit(None, dtype=pl.String).alias(f"{name}__fail"),
    ]


def _unit_column(name: str, source: pl.Expr, profile: Profile) -> list[pl.Expr]:
    family = profile.record.fields_by_name[name].unit_family
    assert family is not None
    text = source.cast(pl.String).str.strip_chars()
    unit = text.str.to_lowercase().replace_strict(UNIT_SPELLINGS, default=None, return_dtype=pl.String)
    allowed = unit.is_in(list(UNIT_CHOICES[family]))
    fail = pl.when(_missing(text, profile)).then(None).when(~allowed | unit.is_null()).then(pl.lit("UNIT_UNKNOWN"))
    return [pl.when(allowed).then(unit).alias(f"{name}{UNIT_SUFFIX}"), fail.alias(f"{name}{UNIT_SUFFIX}__fail")]


@dataclass(frozen=True)
class ColumnPlan:
    """Which source column feeds each canonical field; resolved once per file."""

    mapped: dict[str, str]  # canonical field -> source header present in the file
    unit_sources: dict[str, str]  # canonical field -> source header of its per-row unit column
    missing_optional: list[str]
    extra_columns: list[str]


def plan_columns(path: Path, header: list[str], profile: Profile) -> ColumnPlan:
    """Match the profile's columns to the file's header (case-insensitive); FileRejected
    (``MISSING_COLUMN``) when a mapped column is absent that the profile does not mark
    optional (``[profile] optional_columns``): a column that disappears from an export
    must not load every record with that value empty."""
    by_fold = {h.casefold(): h for h in header}
    mapped: dict[str, str] = {}
    missing: list[str] = []
    missing_optional: list[str] = []
    for canonical, source in profile.columns.items():
        found = by_fold.get(source.strip().casefold())
        if found is not None:
            mapped[canonical] = found
        elif profile.is_optional(source):
            missing_optional.append(canonical)
        else:
            missing.append(f"{source!r} ({canonical})")
    unit_sources: dict[str, str] = {}
    for canonical, source in profile.unit_columns.items():
        found = by_fold.get(source.strip().casefold())
        if found is None:
            missing.append(f"{source!r} (unit column for {canonical})")
        else:
            unit_sources[canonical] = found
    if missing:
        raise FileRejected(
            "MISSING_COLUMN",
            f"{path.name}: mapped column(s) not in the header: {', '.join(missing)} "
            f"(profile {profile.name}; header has {len(header)} columns); if the export may leave a column "
            "out, list it in [profile] optional_columns",
        )
    used = {s.casefold() for s in [*mapped.values(), *unit_sources.values()]}
    extra = [h for h in header if h.casefold() not in used]
    return ColumnPlan(mapped, unit_sources, missing_optional, extra)


class FailureTally:
    """Cell failures per column over every batch of a file, for the whole-file verdict."""

    def __init__(self, plan: ColumnPlan) -> None:
        self.plan = plan
        self.reset()

    def reset(self) -> None:
        """Forget every batch counted so far (the file is being read again)."""
        self.order: list[str] = []
        self.failures: Counter[str] = Counter()
        self.non_empty: Counter[str] = Counter()
        self.reasons: dict[str, Counter[str]] = {}

    def source_of(self, fail_column: str) -> str:
        field = fail_column.removesuffix("__fail")
        if field.endswith(UNIT_SUFFIX):
            return self.plan.unit_sources[field.removesuffix(UNIT_SUFFIX)]
        return self.plan.mapped[field]

    def add(self, typed: pl.DataFrame, fail_columns: list[str], non_empty: dict[str, int]) -> None:
        """Count one batch: failures and their reasons per column, and the non-empty cells
        of each source column that can fail (``non_empty``, by source header)."""
        if not self.order:
            self.order = list(fail_columns)
        if typed.height == 0:
            return
        counts = typed.select(pl.col(c).is_not_null().sum().alias(c) for c in fail_columns).row(0, named=True)
        for column in fail_columns:
            source = self.source_of(column)
            if source in non_empty:
                self.non_empty[column] += non_empty[source]
            if not counts[column]:
                continue
            self.failures[column] += counts[column]
            reasons = typed.get_column(column).drop_nulls().value_counts()
            tally = self.reasons.setdefault(column, Counter())
            for reason, count in reasons.iter_rows():
                tally[reason] += count

    def add_non_empty(self, by_source: dict[str, int]) -> None:
        """Add the non-empty cells of rows counted elsewhere (rows parsed in SQL, which
        cannot fail), by source header, to every column that can fail."""
        for column in self.order:
            self.non_empty[column] += by_source.get(self.source_of(column), 0)

    def check(self, path: Path) -> None:
        """FileRejected when a column fails in (nearly) every row: a fault of the whole file."""
        for column in self.order:
            failures = self.failures[column]
            if not failures:
                continue
            field = column.removesuffix("__fail")
            source = self.source_of(column)
            non_empty = self.non_empty[column]
            share = failures / max(non_empty, 1)
            systematic = (failures >= SYSTEMATIC_MIN_CELLS and share >= 1.0) or (
                non_empty >= SYSTEMATIC_MIN_CELLS_FOR_SHARE and share >= SYSTEMATIC_SHARE
            )
            if systematic:
                ranked = sorted(self.reasons[column].items(), key=lambda item: (-item[1], item[0]))
                cell_reason = ranked[0][0]
                reason = FILE_REASON_FOR_CELL_REASON.get(cell_reason, cell_reason)
                raise FileRejected(
                    reason,
                    f"{path.name}: column {source!r} ({field}) fails in {failures} of {non_empty} rows "
                    f"({cell_reason}); the file does not match its profile",
                )


def parse_export(raw: RawExport, profile: Profile) -> ParsedExport:
    """Parse every mapped cell of a whole file; see the module docstring for what can
    happen to a cell. Raises FileRejected for a fault of the whole file."""
    plan = plan_columns(raw.path, raw.header, profile)
    tally = FailureTally(plan)
    parsed = parse_batch(raw, profile, plan, tally)
    tally.check(raw.path)
    return parsed


def _cell_exprs(canonical: str, source: pl.Expr, dtype: pl.DataType, profile: Profile) -> list[pl.Expr]:
    spec = profile.record.fields_by_name[canonical]
    if spec.kind is Kind.NUMBER:
        return _number(canonical, source, dtype, profile)
    if spec.kind is Kind.TIMESTAMP:
        return _timestamp(canonical, source, dtype, profile, profile.datetime_format)
    if spec.kind is Kind.DATE:
        return _date(canonical, source, dtype, profile)
    if spec.kind is Kind.CODE:
        return _code(canonical, source, profile)
    if spec.kind is Kind.BOOLEAN:
        return _boolean(canonical, source, dtype, profile)
    return _text(canonical, source, profile)


def _distinct_codes(cells: pl.DataFrame, sources: list[str]) -> dict[str, tuple[pl.Series, pl.Series]]:
    """Per column: its distinct texts and, per cell, the position of its text among them
    (a missing cell points one past the end). One hashing pass over each column."""
    fresh = {source: pl.Categories.random() for source in sources}
    categorical = cells.select(pl.col(s).cast(pl.Categorical(fresh[s])) for s in sources)
    found: dict[str, tuple[pl.Series, pl.Series]] = {}
    for source in sources:
        column = categorical.get_column(source)
        present = column.drop_nulls().unique()
        ids = present.to_physical()
        # Categories made afresh number their texts 0, 1, 2, ... as they first appear.
        if ids.sort().equals(pl.int_range(0, ids.len(), dtype=ids.dtype, eager=True), check_names=False):
            texts = present.cast(pl.String).gather(ids.arg_sort())
            found[source] = texts, column.to_physical().fill_null(texts.len())
        else:  # not expected; an enumeration of the texts gives the same answer, slower
            text = cells.get_column(source)
            texts = text.drop_nulls().unique()
            found[source] = texts, text.cast(pl.Enum(texts)).to_physical().fill_null(texts.len())
    return found


def _typed_cells(
    cells: pl.DataFrame, plan: ColumnPlan, profile: Profile
) -> tuple[pl.DataFrame, list[str], dict[str, int]]:
    """Every mapped cell parsed by the expressions above; returns the frame, the number
    fields and, per source column that can fail, its count of non-empty cells.

    Text columns are parsed by distinct value: an export repeats the same few hundred texts
    per column (7.40, 40.1, ART, NC, the ward names), so each distinct text is parsed once,
    with the same expressions, and its results are gathered back onto the rows by position.
    Identifier columns, where nearly every cell differs, are parsed cell by cell; so are
    Parquet's typed columns.
    """
    schema = cells.schema
    columns: list[tuple[str, Callable[[pl.Expr], list[pl.Expr]], bool]] = []
    number_fields: list[str] = []
    fallible: set[str] = set(plan.unit_sources.values())  # source columns whose cells can fail
    fields = profile.record.fields_by_name
    for canonical, source in plan.mapped.items():
        kind, dtype = fields[canonical].kind, schema[source]
        if kind is Kind.NUMBER:
            number_fields.append(canonical)
        if kind is not Kind.TEXT:
            fallible.add(source)
        build = partial(_cell_exprs, canonical, dtype=dtype, profile=profile)
        columns.append((source, build, dtype == pl.String and canonical not in _IDENTIFIERS))
    for canonical, source in plan.unit_sources.items():
        columns.append((source, partial(_unit_column, canonical, profile=profile), schema[source] == pl.String))

    by_value = list(dict.fromkeys(source for source, _, distinct in columns if distinct))
    distinct = _distinct_codes(cells, by_value) if by_value else {}

    non_empty: dict[str, int] = {}
    for source in by_value:
        if source in fallible:
            texts, codes = distinct[source]
            filled = pl.concat([texts.str.strip_chars() != "", pl.Series([False])])
            non_empty[source] = int(filled.gather(codes).sum())
    typed_sources = [s for s, _, by_text in columns if not by_text and s in fallible]
    if typed_sources:
        counted = cells.select(
            (pl.col(s).is_not_null() & (pl.col(s).cast(pl.String).str.strip_chars() != "")).sum().alias(s)
            for s in dict.fromkeys(typed_sources)
        )
        non_empty.update(counted.row(0, named=True))

    names: list[str] = [ROW]
    exprs: list[pl.Expr] = [pl.col(ROW)]
    gathered: list[pl.Series] = []
    for source, build, by_text in columns:
        if not by_text:
            cell_exprs = build(pl.col(source))
            exprs += cell_exprs
            names += [e.meta.output_name() for e in cell_exprs]
            continue
        texts, codes = distinct[source]
        # each distinct text once, then one missing cell: where a missing cell points
        parsed = texts.extend_constant(None, 1).alias(_VALUE).to_frame().select(build(pl.col(_VALUE)))
        for result in parsed.iter_columns():
            names.append(result.name)
            if result.null_count() == result.len():
                exprs.append(pl.lit(None, dtype=result.dtype).alias(result.name))
            else:
                gathered.append(result.gather(codes))
    typed = cells.select(exprs)
    if gathered:
        typed = typed.with_columns(gathered)
    return typed.select(names), number_fields, non_empty


def parse_batch(raw: RawExport, profile: Profile, plan: ColumnPlan, tally: FailureTally) -> ParsedExport:
    """Parse the cells of one batch of a file; failures are added to ``tally``."""
    typed, number_fields, non_empty = _typed_cells(raw.cells, plan, profile)
    required = profile.record.required

    fail_columns = [c for c in typed.columns if c.endswith("__fail")]
    tally.add(typed, fail_columns, non_empty)

    required_missing = [
        pl.when(pl.col(f).is_null() & pl.col(f"{f}__fail").is_null()).then(pl.lit("MISSING_REQUIRED")).alias(f)
        for f in required
    ]
    reasons = [
        pl.coalesce([pl.col(c) for c in fail_columns] + [e for e in required_missing]).alias(REASON),
        pl.concat_str(
            [
                pl.when(pl.col(c).is_not_null()).then(pl.lit(c.removesuffix("__fail") + ":") + pl.col(c))
                for c in fail_columns
            ]
            + [
                pl.when(e.is_not_null()).then(pl.lit(f + ":MISSING_REQUIRED"))
                for f, e in zip(required, required_missing, strict=True)
            ],
            separator="; ",
            ignore_nulls=True,
        ).alias(FAILED),
    ]
    # Most rows have no failure: work the reasons out on the rows that have one.
    failing = [c for c in fail_columns if typed.get_column(c).null_count() < typed.height]
    bad = pl.any_horizontal(
        [pl.col(c).is_not_null() for c in failing]
        + [pl.col(f).is_null() & pl.col(f"{f}__fail").is_null() for f in required]
    )
    where = typed.select(bad.arg_true()).to_series() if typed.height else pl.Series(dtype=pl.UInt32)
    explained = typed[where].select(reasons).with_columns(
        pl.when(pl.col(FAILED) == "").then(None).otherwise(pl.col(FAILED)).alias(FAILED)
    )
    typed = typed.with_columns(
        pl.Series(REASON, [None] * typed.height, dtype=pl.String).scatter(where, explained.get_column(REASON)),
        pl.Series(FAILED, [None] * typed.height, dtype=pl.String).scatter(where, explained.get_column(FAILED)),
        pl.coalesce([pl.col(f"{f}__status") for f in number_fields] + [pl.lit("reported")]).alias(STATUS),
    )

    notes = _value_notes(raw, typed, number_fields, plan.mapped)
    drop = fail_columns + [f"{f}__cmp" for f in number_fields] + [f"{f}__status" for f in number_fields]
    values = typed.drop(drop)
    return ParsedExport(
        values=values,
        notes=notes,
        mapped=plan.mapped,
        missing_optional=plan.missing_optional,
        extra_columns=plan.extra_columns,
    )


def _value_notes(raw: RawExport, typed: pl.DataFrame, number_fields: list[str], mapped: dict[str, str]) -> pl.DataFrame:
    """One row per qualified or text-result cell, keeping the original text."""
    parts = []
    for field in number_fields:
        noted = typed.get_column(f"{field}__cmp").is_not_null() | typed.get_column(f"{field}__status").is_not_null()
        if not noted.any():
            continue
        # typed has the rows of raw.cells in the same order, so the mask picks the same cells
        original = raw.cells.get_column(mapped[field]).cast(pl.String).filter(noted).alias("original_text")
        part = typed.filter(noted).select(
            pl.col(ROW),
            pl.lit(field).alias("field"),
            pl.col(f"{field}__cmp").alias("comparator"),
            pl.col(f"{field}__status").alias("result_status"),
        )
        parts.append(part.with_columns(original))
    if not parts:
        return empty_notes()
    return pl.concat(parts)


def empty_notes() -> pl.DataFrame:
    """A frame of value notes with no rows."""
    return pl.DataFrame(
        schema={
            ROW: pl.Int64,
            "field": pl.String,
            "comparator": pl.String,
            "result_status": pl.String,
            "original_text": pl.String,
        }
    )
