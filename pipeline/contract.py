"""The incoming-batch contract: a great-expectations suite on every export file.

Each file's batch is checked right after unit conversion: the temp view ``stage_rows``
(``sql/ingest/12_stage_rows.sql``), every row of the file, including rows quarantined later
(their unreadable cells are missing). No check reads an identifier other than the sample
id, so the batch is read without the pseudonym joins of ``stage_converted``.

Which rows each check sees (``validate_stage``):

* the structural checks (every contract column present, column types) are run by
  great-expectations on a bounded sample, the file's first ``SAMPLE_ROWS`` rows: a column's
  presence and type are the same in every row, and a bounded sample keeps the cost of a
  file small and the same whatever its size (no pandas copy of the whole file);
* every value check (required values, collection-time window, resulted after collected,
  allowed codes, possible ranges) is counted over **every row** by one SQL aggregate query
  (``aggregate_sql``) with great-expectations' semantics (missing values are not tested by
  ranges and code lists; bounds inclusive; ``mostly``), and those counts decide the check
  and the file's verdict. Tests compare the SQL counts with great-expectations' own on the
  same rows.

The checks: every contract column present, column types,
required values filled, allowed codes, physiologically possible ranges, plausible
collection times. They are listed once, in ``contract_checks`` (ranges and code lists in
``POSSIBLE_RANGES`` and ``ALLOWED_CODES``), each with our own stable ``check_id`` and a
severity passed both to great-expectations' native ``severity`` and to ``meta``.

A file fails the contract badly, and is rejected with reason ``CONTRACT_FAILED``, when a
contract column is missing or has the wrong type, a critical check could not be evaluated,
or a critical check fails for more than a set share of the values it tests (thresholds in
``[contract]`` of ``pipeline/catalogue.toml``). Anything smaller loads: single implausible
records are the business of quarantine and the rules. Every file's results, loaded or
rejected, are kept in the store table ``contract_results`` (counts and percentages only,
never a cell value or an identifier).

Offline and quiet: analytics are switched off (``GX_ANALYTICS_ENABLED=False`` before the
import, and on the context), the context is ephemeral (nothing is written to disk), and
great-expectations' Data Docs are deliberately not built: their pages load scripts and
styles from the internet and do not render offline. The audit report shows
``contract_results`` instead.

Cost: importing great-expectations takes seconds, so it is imported lazily on the first
validation and the context and suite are built once per process and per set of
thresholds. great-expectations validates pandas batches only, and takes slow per-row paths
unless numbers are float64 and timestamps ``datetime64[ns]``; ``pandas_batch`` normalises
the (sample) frame accordingly.

Thresholds: ``[contract]`` of ``pipeline/catalogue.toml``; a site overrides any of them in
its configuration's ``[contract]`` table (``settings_with``).
"""

from __future__ import annotations

import os
import sys
import time
import tomllib
import warnings
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from functools import cache
from pathlib import Path
from typing import TYPE_CHECKING, Any

import duckdb
import polars as pl

from pipeline.errors import FileRejected
from pipeline.schema import FIELDS_BY_NAME, OXYGEN_DEVICES, RESULT_STATUSES, SAMPLE_TYPES, Kind

if TYPE_CHECKING:
    import pandas as pd

CATALOGUE_PATH = Path(__file__).resolve().parent / "catalogue.toml"
CONTRACT_FAILED = "CONTRACT_FAILED"
CRITICAL = "critical"
WARNING = "warning"
SUITE_NAME = "incoming_batch_contract"
# Suite parameter: the latest collection time the contract accepts, set per validation.
LATEST_COLLECTED_PARAMETER = "latest_collected_at"
# Rows of a file great-expectations sees (the structural checks); value checks see all rows.
SAMPLE_ROWS = 1_000

# Physiologically possible ranges, canonical units: values outside cannot come from a living
# patient's sample (common practice). Narrower clinical limits are the rules' business.
# column -> (low, high, unit, severity)
POSSIBLE_RANGES: dict[str, tuple[float, float, str, str]] = {
    "ph": (6.5, 8.0, "", CRITICAL),
    "pao2_mmhg": (10.0, 800.0, "mmHg", CRITICAL),
    "paco2_mmhg": (5.0, 200.0, "mmHg", CRITICAL),
    "fio2": (0.21, 1.0, "", CRITICAL),
    "sao2_pct": (50.0, 100.0, "%", WARNING),
    "spo2_pct": (50.0, 100.0, "%", WARNING),
    "hb_g_dl": (3.0, 25.0, "g/dL", WARNING),
    "temperature_c": (25.0, 45.0, "°C", WARNING),
}
# Allowed code lists (pipeline/schema.py): column -> (codes, severity).
ALLOWED_CODES: dict[str, tuple[tuple[str, ...], str]] = {
    "sample_type": (SAMPLE_TYPES, CRITICAL),
    "o2_device": (OXYGEN_DEVICES, CRITICAL),
    "result_status": (RESULT_STATUSES, WARNING),
}
REQUIRED_COLUMNS: tuple[str, ...] = ("sample_id", "collected_at")
# The staged batch of one file that the contract reads (a temp view of the loader).
BATCH_RELATION = "stage_rows"
# Columns handed to great-expectations: only those a check reads. Identifiers other than the
# sample id are never handed over, and the sample id only as present / absent.
CONTRACT_COLUMNS: tuple[str, ...] = (
    *REQUIRED_COLUMNS,
    "resulted_at",
    *ALLOWED_CODES,
    *POSSIBLE_RANGES,
)
# Expected pandas dtype per canonical kind, after ``pandas_batch``.
_GX_TYPE = {Kind.TEXT: "str", Kind.CODE: "str", Kind.NUMBER: "float64", Kind.TIMESTAMP: "datetime64"}
_EXTRA_KINDS = {"result_status": Kind.CODE}  # provenance column, not a canonical field
# Check kinds whose failure means the batch has the wrong shape: any failure rejects the file.
_STRUCTURAL = ("column_present", "column_type")


@dataclass(frozen=True)
class ContractSettings:
    """The ``[contract]`` table of the catalogue: when a failing file is rejected."""

    reject_unexpected_percent: float
    min_failing_rows: int
    earliest_collected_at: date
    future_tolerance_minutes: float
    resulted_after_collected_mostly: float


@dataclass(frozen=True)
class Check:
    """One contract check: our stable id, the great-expectations class and its arguments."""

    check_id: str
    kind: str
    expectation: str
    columns: tuple[str, ...]
    severity: str
    arguments: tuple[tuple[str, Any], ...]
    description: str


@dataclass
class CheckResult:
    check_id: str
    expectation_type: str
    column_name: str | None
    severity: str
    success: bool
    blocking: bool
    element_count: int | None
    unexpected_count: int | None
    unexpected_percent: float | None
    missing_count: int | None
    observed: str


@dataclass
class ContractOutcome:
    """The contract verdict for one file's batch."""

    file_name: str
    results: list[CheckResult] = field(default_factory=list)
    seconds: float = 0.0
    run_id: str = ""
    file_sha256: str = ""
    source_file: str = ""
    checked_at: datetime | None = None

    @property
    def rejected(self) -> bool:
        return any(r.blocking for r in self.results)

    @property
    def message(self) -> str:
        failing = "; ".join(_describe_failure(r) for r in self.results if r.blocking)
        return f"{self.file_name}: the batch contract failed badly: {failing}"

    def raise_if_rejected(self) -> None:
        if self.rejected:
            raise FileRejected(CONTRACT_FAILED, self.message)


def _describe_failure(r: CheckResult) -> str:
    if r.unexpected_percent is None or r.expectation_type == "expect_column_values_to_be_of_type":
        return f"{r.check_id} ({r.observed})"
    return f"{r.check_id} {r.unexpected_percent:.1f} % unexpected ({r.observed})"


def load_settings(path: Path = CATALOGUE_PATH) -> ContractSettings:
    raw = tomllib.loads(path.read_text(encoding="utf-8"))["contract"]
    return settings_with(_catalogue_defaults(raw), {}, str(path))


def _catalogue_defaults(raw: dict[str, Any]) -> ContractSettings:
    return ContractSettings(
        reject_unexpected_percent=float(raw["reject_unexpected_percent"]),
        min_failing_rows=int(raw["min_failing_rows"]),
        earliest_collected_at=raw["earliest_collected_at"],
        future_tolerance_minutes=float(raw["future_tolerance_minutes"]),
        resulted_after_collected_mostly=float(raw["resulted_after_collected_mostly"]),
    )


SETTING_NAMES: tuple[str, ...] = tuple(ContractSettings.__dataclass_fields__)


def settings_with(base: ContractSettings, overrides: dict[str, Any], where: str) -> ContractSettings:
    """``base`` with a site's ``[contract]`` overrides, each checked; ``ConfigError`` (naming
    ``where``) for an unknown name or a value of the wrong type or outside its range."""
    from pipeline.errors import ConfigError

    unknown = sorted(set(overrides) - set(SETTING_NAMES))
    if unknown:
        raise ConfigError(
            f"{where}: unknown key(s) in [contract]: {', '.join(unknown)}; known: {', '.join(SETTING_NAMES)}"
        )
    values = {name: getattr(base, name) for name in SETTING_NAMES} | overrides

    def number(name: str, low: float, high: float) -> float:
        value = values[name]
        if isinstance(value, bool) or not isinstance(value, int | float) or not low <= value <= high:
            raise ConfigError(f"{where}: [contract] {name} must be a number from {low:g} to {high:g}")
        return float(value)

    rows = values["min_failing_rows"]
    if isinstance(rows, bool) or not isinstance(rows, int) or rows < 1:
        raise ConfigError(f"{where}: [contract] min_failing_rows must be a whole number of at least 1")
    earliest = values["earliest_collected_at"]
    if isinstance(earliest, datetime) or not isinstance(earliest, date):
        raise ConfigError(f"{where}: [contract] earliest_collected_at must be a date, e.g. 1990-01-01 (no quotes)")
    return ContractSettings(
        reject_unexpected_percent=number("reject_unexpected_percent", 0.0, 100.0),
        min_failing_rows=rows,
        earliest_collected_at=earliest,
        future_tolerance_minutes=number("future_tolerance_minutes", 0.0, 7 * 24 * 60.0),
        resulted_after_collected_mostly=number("resulted_after_collected_mostly", 0.0, 1.0),
    )


def _kind(column: str) -> Kind:
    return _EXTRA_KINDS.get(column) or FIELDS_BY_NAME[column].kind


def contract_checks(settings: ContractSettings) -> tuple[Check, ...]:
    """Every check of the contract, in the order they are reported."""
    checks: list[Check] = [
        Check(
            "columns_present",
            "column_present",
            "ExpectTableColumnsToMatchSet",
            (),
            CRITICAL,
            (("column_set", list(CONTRACT_COLUMNS)), ("exact_match", False)),
            "every contract column present",
        )
    ]
    for column in CONTRACT_COLUMNS:
        gx_type = _GX_TYPE[_kind(column)]
        checks.append(
            Check(
                f"{column}_type",
                "column_type",
                "ExpectColumnValuesToBeOfType",
                (column,),
                CRITICAL,
                (("column", column), ("type_", gx_type)),
                f"values of type {gx_type}",
            )
        )
    for column in REQUIRED_COLUMNS:
        checks.append(
            Check(
                f"{column}_not_null",
                "required",
                "ExpectColumnValuesToNotBeNull",
                (column,),
                CRITICAL,
                (("column", column),),
                "missing",
            )
        )
    earliest = datetime.combine(settings.earliest_collected_at, datetime.min.time())
    checks.append(
        Check(
            "collected_at_window",
            "range",
            "ExpectColumnValuesToBeBetween",
            ("collected_at",),
            CRITICAL,
            (
                ("column", "collected_at"),
                ("min_value", earliest),
                ("max_value", {"$PARAMETER": LATEST_COLLECTED_PARAMETER}),
            ),
            f"collected before {earliest:%Y-%m-%d} or in the future",
        )
    )
    checks.append(
        Check(
            "resulted_after_collected",
            "order",
            "ExpectColumnPairValuesAToBeGreaterThanB",
            ("resulted_at", "collected_at"),
            WARNING,
            (
                ("column_A", "resulted_at"),
                ("column_B", "collected_at"),
                ("or_equal", True),
                ("ignore_row_if", "either_value_is_missing"),
                ("mostly", settings.resulted_after_collected_mostly),
            ),
            "resulted before collected",
        )
    )
    for column, (codes, severity) in ALLOWED_CODES.items():
        checks.append(
            Check(
                f"{column}_allowed_codes",
                "codes",
                "ExpectColumnValuesToBeInSet",
                (column,),
                severity,
                (("column", column), ("value_set", list(codes))),
                "code not in the allowed list",
            )
        )
    for column, (low, high, unit, severity) in POSSIBLE_RANGES.items():
        checks.append(
            Check(
                f"{column}_range",
                "range",
                "ExpectColumnValuesToBeBetween",
                (column,),
                severity,
                (("column", column), ("min_value", low), ("max_value", high)),
                f"outside {low:g}-{high:g}{(' ' + unit) if unit else ''}",
            )
        )
    names = [c.check_id for c in checks]
    if len(set(names)) != len(names):
        raise RuntimeError("contract check ids must be unique")
    # great-expectations matches column names ignoring case: two names equal under casefold
    # would silently be checked as one column (tech notes section 1.2).
    if len({c.casefold() for c in CONTRACT_COLUMNS}) != len(CONTRACT_COLUMNS):
        raise RuntimeError("contract column names must be unique ignoring case")
    return tuple(checks)


def pandas_batch(frame: pl.DataFrame) -> pd.DataFrame:
    """The frame as pandas with the dtypes great-expectations evaluates fast.

    float64 numbers, int64 integers, ``datetime64[ns]`` timestamps; text stays pandas
    ``str``. Other dtypes make great-expectations fall back to per-row Python.
    """
    casts: list[pl.Expr] = []
    for name, dtype in frame.schema.items():
        if isinstance(dtype, pl.Datetime):
            casts.append(pl.col(name).dt.replace_time_zone(None).cast(pl.Datetime("ns")))
        elif dtype.is_float():
            casts.append(pl.col(name).cast(pl.Float64))
        elif dtype.is_integer():
            casts.append(pl.col(name).cast(pl.Int64))
        elif dtype == pl.Null:
            casts.append(pl.col(name).cast(pl.Float64))
    return frame.with_columns(casts).to_pandas() if casts else frame.to_pandas()


class _Validator:
    """The great-expectations context, batch definition and suite, built once."""

    def __init__(self, checks: tuple[Check, ...]) -> None:
        gx, expectations, progress_bars = import_great_expectations()
        self.checks = {c.check_id: c for c in checks}
        self.context = gx.get_context(mode="ephemeral")
        self.context.enable_analytics(False)
        self.context.variables.progress_bars = progress_bars(globally=False)
        self.batch_definition = (
            self.context.data_sources.add_pandas("incoming_batches")
            .add_dataframe_asset(BATCH_RELATION)
            .add_batch_definition_whole_dataframe("whole_file")
        )
        self.suite = suite = self.context.suites.add(gx.ExpectationSuite(name=SUITE_NAME))
        for check in checks:
            expectation_class = getattr(expectations, check.expectation)
            suite.add_expectation(
                expectation_class(
                    **dict(check.arguments),
                    severity=check.severity,
                    meta={"check_id": check.check_id, "severity": check.severity},
                )
            )

    def run(self, frame: pd.DataFrame, latest_collected_at: datetime) -> Any:
        # Batch.validate rather than a ValidationDefinition: the latter also keeps every result
        # in the context's (in-memory) results store, which costs time and grows with each file.
        batch = self.batch_definition.get_batch(batch_parameters={"dataframe": frame})
        return batch.validate(
            self.suite,
            expectation_parameters={LATEST_COLLECTED_PARAMETER: latest_collected_at},
            # Counts only: no unexpected values are collected, so none can leak into results.
            result_format={"result_format": "BASIC", "partial_unexpected_count": 0},
        )


def import_great_expectations() -> tuple[Any, Any, Any]:
    """great-expectations, imported once per process (several seconds; the nightly job pays it
    once, whatever the number of files): its package, its expectations and its progress-bar
    settings."""
    os.environ["GX_ANALYTICS_ENABLED"] = "False"
    with warnings.catch_warnings():
        # GX-internal noise: great_expectations imports the deprecated stdlib modules
        # sre_constants / sre_parse at import time. Nothing of ours is affected.
        warnings.filterwarnings(
            "ignore", message=r"module 'sre_(constants|parse)' is deprecated", category=DeprecationWarning
        )
        # great-expectations imports pyspark when the [spark] extra is installed, and pyspark
        # warns about the pandas version on import: nothing the contract uses.
        warnings.filterwarnings("ignore", message=r"PySpark does not yet fully support pandas", category=FutureWarning)
        # pyspark.sql.connect, which great-expectations tries to import, ends the process with
        # exit status 0 when __main__ has neither __spec__ nor __file__ and the interpreter is
        # not interactive (it takes that for its own doctest run): `python -c ...`, pytest-xdist
        # workers. Looking interactive during the import makes it raise ImportError instead,
        # which great-expectations expects when Spark Connect's dependencies are missing.
        main = sys.modules.get("__main__")
        looks_like_doctest = (
            main is not None
            and getattr(main, "__spec__", None) is None
            and not hasattr(main, "__file__")
            and not hasattr(sys, "ps1")
        )
        if looks_like_doctest:
            sys.ps1 = ">>> "
        try:
            import great_expectations as gx
            import great_expectations.expectations as gxe
            from great_expectations.data_context.types.base import ProgressBarsConfig
        finally:
            if looks_like_doctest:
                del sys.ps1
    return gx, gxe, ProgressBarsConfig


@cache
def _settings_and_validator() -> tuple[ContractSettings, _Validator]:
    """Import great-expectations and build the suite once per process."""
    settings = load_settings()
    return settings, _validator_for(settings)


@cache
def _validator_for(settings: ContractSettings) -> _Validator:
    """The suite for one set of thresholds, built once per process (sites that override
    ``[contract]`` get their own)."""
    return _Validator(contract_checks(settings))


@cache
def _structural_validator_for(settings: ContractSettings) -> _Validator:
    """The structural checks only (columns present, their types): what the sample decides
    in ``validate_stage``. Every value check is counted over all rows in SQL there, so
    running it on the sample as well would cost three quarters of the suite's time for a
    result that is replaced."""
    return _Validator(tuple(c for c in contract_checks(settings) if c.kind in _STRUCTURAL))


def build_validator(settings: ContractSettings) -> _Validator:
    """A fresh, uncached validator (tests build one under a network ban)."""
    return _Validator(contract_checks(settings))


def validate_frame(
    frame: pl.DataFrame,
    file_name: str,
    *,
    now: datetime | None = None,
    validator: _Validator | None = None,
    settings: ContractSettings | None = None,
) -> ContractOutcome:
    """Check one batch (canonical columns, canonical units) against the contract."""
    if validator is None or settings is None:
        settings, validator = _settings_and_validator()
    started = time.perf_counter()
    now = now or datetime.now(UTC).replace(tzinfo=None)
    present = [c for c in CONTRACT_COLUMNS if c in frame.columns]
    if len({c.casefold() for c in frame.columns}) != len(frame.columns):
        raise RuntimeError("batch column names must be unique ignoring case")
    selected = frame.select(present)
    if "sample_id" in present:
        # Only presence matters to the contract; the identifier itself stays out of it.
        selected = selected.with_columns(
            pl.when(pl.col("sample_id").is_null()).then(None).otherwise(pl.lit("present")).alias("sample_id")
        )
    latest = now + timedelta(minutes=settings.future_tolerance_minutes)
    result = validator.run(pandas_batch(selected), latest)
    outcome = ContractOutcome(file_name=file_name, checked_at=now)
    absent = set(CONTRACT_COLUMNS) - set(present)
    for item in result.results:
        check = validator.checks[item.expectation_config.meta["check_id"]]
        checked = _check_result(check, item, settings)
        if absent & set(check.columns):
            # Reported once, by columns_present; the checks of an absent column cannot run.
            checked.success, checked.blocking, checked.observed = False, False, "column missing"
        outcome.results.append(checked)
    order = {check_id: n for n, check_id in enumerate(validator.checks)}
    outcome.results.sort(key=lambda r: order[r.check_id])  # GX does not keep the suite's order
    outcome.seconds = time.perf_counter() - started
    return outcome


def _raised(info: dict[str, Any] | None) -> bool:
    """Did the expectation fail to run? GX reports it flat, or per metric when a metric failed."""
    if not info:
        return False
    if "raised_exception" in info:
        return bool(info["raised_exception"])
    return any(isinstance(v, dict) and v.get("raised_exception") for v in info.values())


def _check_result(check: Check, item: Any, settings: ContractSettings) -> CheckResult:
    raised = _raised(item.exception_info)
    details = dict(item.result or {})
    element_count = details.get("element_count")
    unexpected_count = details.get("unexpected_count")
    unexpected_percent = details.get("unexpected_percent")
    missing_count = details.get("missing_count")
    success = bool(item.success) and not raised
    if raised:
        observed = "could not be evaluated"
    elif check.kind == "column_present":
        missing = ((details.get("details") or {}).get("mismatched") or {}).get("missing") or []
        observed = "all present" if success else f"column(s) missing: {', '.join(sorted(missing))}"
    elif check.kind == "column_type":
        observed = f"observed type {details.get('observed_value')}"
    elif unexpected_count is None:
        observed = check.description
    elif check.kind == "required":
        observed = f"{unexpected_count} of {element_count} rows {check.description}"
    else:
        tested = (element_count or 0) - (missing_count or 0) if missing_count is not None else element_count
        observed = f"{unexpected_count} of {tested} values {check.description}"
    blocking = False
    if check.severity == CRITICAL and not success:
        if raised or check.kind in _STRUCTURAL:
            blocking = True
        else:
            blocking = (
                unexpected_percent is not None
                and unexpected_percent > settings.reject_unexpected_percent
                and (unexpected_count or 0) >= settings.min_failing_rows
            )
    return CheckResult(
        check_id=check.check_id,
        expectation_type=item.expectation_config.type,
        column_name=", ".join(check.columns) or None,
        severity=check.severity,
        success=success,
        blocking=blocking,
        element_count=element_count,
        unexpected_count=unexpected_count,
        unexpected_percent=unexpected_percent,
        missing_count=missing_count,
        observed=observed,
    )


def _sql_literal(value: object) -> str:
    if isinstance(value, datetime):
        return f"timestamp '{value:%Y-%m-%d %H:%M:%S.%f}'"
    if isinstance(value, str):
        return "'" + value.replace("'", "''") + "'"
    return repr(float(value))  # type: ignore[arg-type]


def aggregate_sql(checks: tuple[Check, ...], present: set[str], latest: datetime, table: str) -> tuple[str, list[str]]:
    """One aggregate query over every row of ``table``: per value check its element,
    unexpected and missing counts, with great-expectations' semantics (NULLs are missing,
    not unexpected, for ranges, code lists and column pairs; range bounds inclusive).
    Returns the SQL and the check ids it counts."""
    parts = ["count(*) as n"]
    counted: list[str] = []
    for check in checks:
        if check.kind in _STRUCTURAL or not set(check.columns) <= present:
            continue
        args = dict(check.arguments)
        if check.expectation == "ExpectColumnValuesToNotBeNull":
            c = args["column"]
            missing, unexpected = "false", f"{c} is null"  # a NULL is what this check counts
        elif check.expectation == "ExpectColumnValuesToBeBetween":
            c = args["column"]
            high = latest if isinstance(args["max_value"], dict) else args["max_value"]
            missing = f"{c} is null"
            unexpected = f"{c} < {_sql_literal(args['min_value'])} or {c} > {_sql_literal(high)}"
        elif check.expectation == "ExpectColumnValuesToBeInSet":
            c = args["column"]
            codes = " or ".join(f"{c} = {_sql_literal(v)}" for v in args["value_set"])
            missing, unexpected = f"{c} is null", f"not ({codes})"
        elif check.expectation == "ExpectColumnPairValuesAToBeGreaterThanB":
            a, b = args["column_A"], args["column_B"]
            missing = f"{a} is null or {b} is null"
            unexpected = f"{a} < {b}" if args.get("or_equal") else f"{a} <= {b}"
        else:  # a new kind of check must say how SQL counts it
            raise RuntimeError(f"no SQL count for {check.expectation}")
        i = len(counted)
        parts.append(f"count(*) filter (where {missing}) as m{i}")
        parts.append(f"count(*) filter (where not ({missing}) and ({unexpected})) as u{i}")
        counted.append(check.check_id)
    return f"select {', '.join(parts)} from {table}", counted


def _counted_result(check: Check, rows: int, missing: int, unexpected: int, settings: ContractSettings) -> CheckResult:
    """A value check decided by counts over every row, as great-expectations decides it."""
    if check.kind == "required":
        element_count, missing_count, tested = rows, None, rows
        percent = 100.0 * unexpected / rows if rows else 0.0
    else:
        element_count, missing_count, tested = rows, missing, rows - missing
        percent = 100.0 * unexpected / tested if tested else 0.0
    mostly = dict(check.arguments).get("mostly", 1.0)
    success = unexpected == 0 if mostly >= 1.0 else (tested == 0 or (tested - unexpected) / tested >= mostly)
    if check.kind == "required":
        observed = f"{unexpected} of {element_count} rows {check.description}"
    else:
        observed = f"{unexpected} of {tested} values {check.description}"
    blocking = (
        check.severity == CRITICAL
        and not success
        and percent > settings.reject_unexpected_percent
        and unexpected >= settings.min_failing_rows
    )
    return CheckResult(
        check_id=check.check_id,
        expectation_type=_snake(check.expectation),
        column_name=", ".join(check.columns) or None,
        severity=check.severity,
        success=success,
        blocking=blocking,
        element_count=element_count,
        unexpected_count=unexpected,
        unexpected_percent=percent,
        missing_count=missing_count,
        observed=observed,
    )


def _snake(name: str) -> str:
    """great-expectations' expectation type of a class name (ExpectColumn... -> expect_column...)."""
    return "".join(f"_{c.lower()}" if c.isupper() else c for c in name).lstrip("_")


def validate_stage(
    con: duckdb.DuckDBPyConnection,
    path: Path,
    run_id: str,
    file_sha256: str,
    *,
    settings: ContractSettings | None = None,
    now: datetime | None = None,
) -> ContractOutcome:
    """Check the batch in the temp view ``stage_rows`` (one file, after unit conversion).

    great-expectations runs the structural checks (columns present, their types) on the
    file's first ``SAMPLE_ROWS`` rows; every value check is counted over all rows in SQL
    (``aggregate_sql``) and decided from those counts (see the module docstring). A value
    check of an absent column is reported as such (the columns check fails the file)."""
    settings = settings or load_settings()
    checks = contract_checks(settings)
    now = now or datetime.now(UTC).replace(tzinfo=None)
    stage_columns = con.sql(f"select * from {BATCH_RELATION} limit 0").columns
    wanted = [c for c in CONTRACT_COLUMNS if c in stage_columns]
    sample = con.sql(f"select {', '.join(wanted)} from {BATCH_RELATION} order by source_row limit {SAMPLE_ROWS}").pl()
    outcome = validate_frame(
        sample, path.name, now=now, validator=_structural_validator_for(settings), settings=settings
    )
    latest = now + timedelta(minutes=settings.future_tolerance_minutes)
    query, counted = aggregate_sql(checks, set(wanted), latest, BATCH_RELATION)
    counts = con.execute(query).fetchall()[0]
    rows = int(counts[0])
    by_id = {c.check_id: c for c in checks}
    for i, check_id in enumerate(counted):
        missing, unexpected = int(counts[1 + 2 * i]), int(counts[2 + 2 * i])
        outcome.results.append(_counted_result(by_id[check_id], rows, missing, unexpected, settings))
    for check in checks:
        if check.kind not in _STRUCTURAL and not set(check.columns) <= set(wanted):
            outcome.results.append(_absent_column_result(check))
    order = {c.check_id: n for n, c in enumerate(checks)}
    outcome.results.sort(key=lambda r: order[r.check_id])
    outcome.run_id, outcome.file_sha256, outcome.source_file = run_id, file_sha256, str(path)
    return outcome


def _absent_column_result(check: Check) -> CheckResult:
    """A value check whose column is not in the batch: not run, not blocking on its own."""
    return CheckResult(
        check_id=check.check_id,
        expectation_type=_snake(check.expectation),
        column_name=", ".join(check.columns) or None,
        severity=check.severity,
        success=False,
        blocking=False,
        element_count=None,
        unexpected_count=None,
        unexpected_percent=None,
        missing_count=None,
        observed="column missing",
    )


_RESULT_SCHEMA: dict[str, pl.DataType] = {
    "run_id": pl.String(),
    "file_sha256": pl.String(),
    "source_file": pl.String(),
    "check_id": pl.String(),
    "expectation_type": pl.String(),
    "column_name": pl.String(),
    "severity": pl.String(),
    "success": pl.Boolean(),
    "blocking": pl.Boolean(),
    "element_count": pl.Int64(),
    "unexpected_count": pl.Int64(),
    "unexpected_percent": pl.Float64(),
    "missing_count": pl.Int64(),
    "observed": pl.String(),
    "checked_at": pl.Datetime("us"),
}


def keep_results(con: duckdb.DuckDBPyConnection, outcome: ContractOutcome, *, own_transaction: bool = False) -> None:
    """Insert the outcome into ``contract_results``; in the caller's transaction unless asked.

    A rejected file's load is rolled back, so its results are written afterwards in their
    own small transaction (``own_transaction=True``).
    """
    rows = [
        {
            "run_id": outcome.run_id,
            "file_sha256": outcome.file_sha256,
            "source_file": outcome.source_file,
            "checked_at": outcome.checked_at,
            **{k: v for k, v in vars(r).items()},
        }
        for r in outcome.results
    ]
    frame = pl.DataFrame(rows, schema=_RESULT_SCHEMA)
    if own_transaction:
        con.execute("begin transaction")
    try:
        con.register("contract_results_frame", frame)
        try:
            con.execute("insert into contract_results by name select * from contract_results_frame")
        finally:
            con.unregister("contract_results_frame")
        if own_transaction:
            con.execute("commit")
    except BaseException:
        if own_transaction:
            con.execute("rollback")
        raise


__all__ = [
    "CONTRACT_FAILED",
    "Check",
    "CheckResult",
    "ContractOutcome",
    "ContractSettings",
    "aggregate_sql",
    "build_validator",
    "contract_checks",
    "keep_results",
    "load_settings",
    "pandas_batch",
    "settings_with",
    "validate_frame",
    "validate_stage",
]
