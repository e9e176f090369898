"""Turn the text cells of one export into typed canonical values, cell by cell.

Each cell either parses, is missing, or fails with a stable reason code. A numeric cell
may carry a qualifier (``>600`` keeps 600 and the comparator ``>``) or a recognised text
result (``haemolysed``): the value is then NULL and the text is kept as a result status.
Values stay in the unit the profile declares; conversion to canonical units happens in
SQL (``sql/ingest/``) with the unit macros, so each conversion factor has one home.

A column where every non-empty cell fails (wrong date format, wrong decimal mark, an
unmapped code list) is a fault of the whole file: ``FileRejected``, one message.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import polars as pl

from pipeline.errors import FileRejected
from pipeline.ingest.read import ROW, RawExport
from pipeline.profile import Profile
from pipeline.schema import FIELDS_BY_NAME, REQUIRED_FIELDS, UNIT_CHOICES, Kind

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
    codes = profile.sample_type_codes if name == "sample_type" else profile.device_codes
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
    family = FIELDS_BY_NAME[name].unit_family
    assert family is not None
    text = source.cast(pl.String).str.strip_chars()
    unit = text.str.to_lowercase().replace_strict(UNIT_SPELLINGS, default=None, return_dtype=pl.String)
    allowed = unit.is_in(list(UNIT_CHOICES[family]))
    fail = pl.when(_missing(text, profile)).then(None).when(~allowed | unit.is_null()).then(pl.lit("UNIT_UNKNOWN"))
    return [pl.when(allowed).then(unit).alias(f"{name}{UNIT_SUFFIX}"), fail.alias(f"{name}{UNIT_SUFFIX}__fail")]


def _resolve_columns(raw: RawExport, profile: Profile) -> tuple[dict[str, str], dict[str, str], list[str], list[str]]:
    by_fold = {h.casefold(): h for h in raw.header}
    mapped: dict[str, str] = {}
    missing_required: list[str] = []
    missing_optional: list[str] = []
    for canonical, source in profile.columns.items():
        found = by_fold.get(source.strip().casefold())
        if found is not None:
            mapped[canonical] = found
        elif canonical in REQUIRED_FIELDS:
            missing_required.append(f"{source!r} ({canonical})")
        else:
            missing_optional.append(canonical)
    unit_sources: dict[str, str] = {}
    for canonical, source in profile.unit_columns.items():
        found = by_fold.get(source.strip().casefold())
        if found is None:
            missing_required.append(f"{source!r} (unit column for {canonical})")
        else:
            unit_sources[canonical] = found
    if missing_required:
        raise FileRejected(
            "MISSING_COLUMN",
            f"{raw.path.name}: required column(s) not in the header: {', '.join(missing_required)} "
            f"(profile {profile.name}; header has {len(raw.header)} columns)",
        )
    used = {s.casefold() for s in [*mapped.values(), *unit_sources.values()]}
    extra = [h for h in raw.header if h.casefold() not in used]
    return mapped, unit_sources, missing_optional, extra


def parse_export(raw: RawExport, profile: Profile) -> ParsedExport:
    """Parse every mapped cell; see the module docstring for what can happen to a cell."""
    mapped, unit_sources, missing_optional, extra = _resolve_columns(raw, profile)
    schema = raw.cells.schema
    exprs: list[pl.Expr] = [pl.col(ROW)]
    number_fields: list[str] = []
    for canonical, source in mapped.items():
        spec = FIELDS_BY_NAME[canonical]
        col, dtype = pl.col(source), schema[source]
        if spec.kind is Kind.NUMBER:
            exprs += _number(canonical, col, dtype, profile)
            number_fields.append(canonical)
        elif spec.kind is Kind.TIMESTAMP:
            exprs += _timestamp(canonical, col, dtype, profile, profile.datetime_format)
        elif spec.kind is Kind.DATE:
            exprs += _date(canonical, col, dtype, profile)
        elif spec.kind is Kind.CODE:
            exprs += _code(canonical, col, profile)
        elif spec.kind is Kind.BOOLEAN:
            exprs += _boolean(canonical, col, dtype, profile)
        else:
            exprs += _text(canonical, col, profile)
    for canonical, source in unit_sources.items():
        exprs += _unit_column(canonical, pl.col(source), profile)
    typed = raw.cells.select(exprs)

    fail_columns = [c for c in typed.columns if c.endswith("__fail")]
    _reject_systematic_failures(raw, typed, fail_columns, mapped, unit_sources)

    required_missing = [
        pl.when(pl.col(f).is_null() & pl.col(f"{f}__fail").is_null()).then(pl.lit("MISSING_REQUIRED")).alias(f)
        for f in REQUIRED_FIELDS
    ]
    typed = typed.with_columns(
        pl.coalesce([pl.col(c) for c in fail_columns] + [e for e in required_missing]).alias(REASON),
        pl.concat_str(
            [
                pl.when(pl.col(c).is_not_null()).then(pl.lit(c.removesuffix("__fail") + ":") + pl.col(c))
                for c in fail_columns
            ]
            + [
                pl.when(e.is_not_null()).then(pl.lit(f + ":MISSING_REQUIRED"))
                for f, e in zip(REQUIRED_FIELDS, required_missing, strict=True)
            ],
            separator="; ",
            ignore_nulls=True,
        ).alias(FAILED),
        pl.coalesce([pl.col(f"{f}__status") for f in number_fields] + [pl.lit("reported")]).alias(STATUS),
    )

    notes = _value_notes(raw, typed, number_fields, mapped)
    drop = fail_columns + [f"{f}__cmp" for f in number_fields] + [f"{f}__status" for f in number_fields]
    values = typed.drop(drop).with_columns(
        pl.when(pl.col(FAILED) == "").then(None).otherwise(pl.col(FAILED)).alias(FAILED)
    )
    return ParsedExport(
        values=values, notes=notes, mapped=mapped, missing_optional=missing_optional, extra_columns=extra
    )


def _reject_systematic_failures(
    raw: RawExport, typed: pl.DataFrame, fail_columns: list[str], mapped: dict[str, str], unit_sources: dict[str, str]
) -> None:
    if typed.height == 0:
        return
    counts = typed.select(
        [pl.col(c).is_not_null().sum().alias(c) for c in fail_columns]
        + [pl.col(c).drop_nulls().mode().first().alias(c + "_mode") for c in fail_columns]
    ).row(0, named=True)
    for column in fail_columns:
        failures = counts[column]
        if not failures:
            continue
        field = column.removesuffix("__fail")
        if field.endswith(UNIT_SUFFIX):
            source = unit_sources[field.removesuffix(UNIT_SUFFIX)]
        else:
            source = mapped[field]
        non_empty = raw.cells.select(
            (pl.col(source).is_not_null() & (pl.col(source).cast(pl.String).str.strip_chars() != "")).sum()
        ).item()
        share = failures / max(non_empty, 1)
        systematic = (failures >= SYSTEMATIC_MIN_CELLS and share >= 1.0) or (
            non_empty >= SYSTEMATIC_MIN_CELLS_FOR_SHARE and share >= SYSTEMATIC_SHARE
        )
        if systematic:
            cell_reason = counts[column + "_mode"]
            reason = FILE_REASON_FOR_CELL_REASON.get(cell_reason, cell_reason)
            raise FileRejected(
                reason,
                f"{raw.path.name}: column {source!r} ({field}) fails in {failures} of {non_empty} rows "
                f"({cell_reason}); the file does not match its profile",
            )


def _value_notes(raw: RawExport, typed: pl.DataFrame, number_fields: list[str], mapped: dict[str, str]) -> pl.DataFrame:
    """One row per qualified or text-result cell, keeping the original text."""
    parts = []
    for field in number_fields:
        part = typed.filter(pl.col(f"{field}__cmp").is_not_null() | pl.col(f"{field}__status").is_not_null()).select(
            pl.col(ROW),
            pl.lit(field).alias("field"),
            pl.col(f"{field}__cmp").alias("comparator"),
            pl.col(f"{field}__status").alias("result_status"),
        )
        if part.height:
            original = raw.cells.select(ROW, pl.col(mapped[field]).cast(pl.String).alias("original_text"))
            parts.append(part.join(original, on=ROW, how="left"))
    if not parts:
        return pl.DataFrame(
            schema={
                ROW: pl.Int64,
                "field": pl.String,
                "comparator": pl.String,
                "result_status": pl.String,
                "original_text": pl.String,
            }
        )
    return pl.concat(parts)
