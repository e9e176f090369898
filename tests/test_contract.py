"""The incoming-batch contract (great-expectations) on each export file.

A clean batch passes; a critical check failing for most rows rejects the file with
CONTRACT_FAILED and a message naming the check; smaller failures load; results are kept
for loaded and rejected files; no identifier reaches the results; no network is used.

The physiologically possible ranges (pH 6.5-8.0, PaO2 10-800 mmHg, SpO2 50-100 %, ...) and
the rejection thresholds (> 50 % of tested values and at least 5 rows) are common practice;
the boundary tests below use them.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Iterator
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import polars as pl
import pytest

from pipeline.contract import (
    BATCH_RELATION,
    CONTRACT_COLUMNS,
    CONTRACT_FAILED,
    ContractOutcome,
    build_validator,
    contract_checks,
    load_settings,
    pandas_batch,
    validate_frame,
    validate_stage,
)
from pipeline.contract import _settings_and_validator as shared_validator
from pipeline.ingest.load import ingest_file
from pipeline.profile import Profile, load_profile
from pipeline.schema import FIELDS
from pipeline.store import open_store

FIXTURES = Path(__file__).parent / "fixtures"
KEY = b"test-key-0123456789abcdef"
NOW = datetime(2026, 3, 3, 12, 0)
HEADER = "id,mrn,ward,collected,resulted,type,device,fio2,ph,pco2,po2,hco3\n"
# Identifiers that must never appear in contract results or messages.
ROW = "ACC-5{n:04d},MRN-88{n:04d},W1,2026-03-02 10:{n:02d},2026-03-02 10:{m:02d},A,RA,0.21,{ph},40,95,24\n"


@pytest.fixture(scope="module")
def shared() -> Iterator[None]:
    """Import great-expectations and build the suite once for the module (slow: seconds)."""
    shared_validator()
    yield


def clean_frame(rows: int = 20) -> pl.DataFrame:
    collected = [NOW - timedelta(days=1, minutes=i) for i in range(rows)]
    return pl.DataFrame(
        {
            "sample_id": [f"ACC-{i}" for i in range(rows)],
            "collected_at": collected,
            "resulted_at": [c + timedelta(minutes=6) for c in collected],
            "sample_type": ["arterial"] * rows,
            "o2_device": ["room_air"] * rows,
            "result_status": ["reported"] * rows,
            "fio2": [0.21] * rows,
            "ph": [7.40] * rows,
            "pao2_mmhg": [95.0] * rows,
            "paco2_mmhg": [40.0] * rows,
            "sao2_pct": [97.0] * rows,
            "spo2_pct": [97.0] * rows,
            "hb_g_dl": [13.5] * rows,
            "temperature_c": [37.0] * rows,
        },
        schema_overrides={"collected_at": pl.Datetime("us"), "resulted_at": pl.Datetime("us")},
    )


def with_values(frame: pl.DataFrame, column: str, value: object, count: int) -> pl.DataFrame:
    """The first ``count`` rows get ``value`` in ``column``."""
    index = pl.int_range(pl.len())
    return frame.with_columns(
        pl.when(index < count).then(pl.lit(value, dtype=frame.schema[column])).otherwise(pl.col(column)).alias(column)
    )


def result(outcome: ContractOutcome, check_id: str):
    return next(r for r in outcome.results if r.check_id == check_id)


def validate(frame: pl.DataFrame) -> ContractOutcome:
    return validate_frame(frame, "export.csv", now=NOW)


def test_names_are_unique_ignoring_case_and_the_guard_fires(shared):
    # great-expectations resolves columns case-insensitively (tech notes section 1.2).
    names = [f.name for f in FIELDS]
    assert len({n.casefold() for n in names}) == len(names)
    assert len({n.casefold() for n in CONTRACT_COLUMNS}) == len(CONTRACT_COLUMNS)
    frame = clean_frame(3).with_columns(pl.col("ph").alias("pH"))
    with pytest.raises(RuntimeError, match="ignoring case"):
        validate(frame)


def test_every_expectation_carries_our_id_and_its_severity(shared):
    settings, validator = shared_validator()
    checks = {c.check_id: c for c in contract_checks(settings)}
    expectations = validator.suite.expectations
    assert len(expectations) == len(checks)
    for expectation in expectations:
        check = checks[expectation.meta["check_id"]]
        assert expectation.meta["severity"] == check.severity == expectation.severity.value
        assert check.severity in ("critical", "warning")
    # Required fields are critical; a value a rule can explain is only a warning.
    assert checks["sample_id_not_null"].severity == checks["collected_at_not_null"].severity == "critical"
    assert checks["ph_range"].severity == "critical" and checks["spo2_pct_range"].severity == "warning"


def test_clean_batch_passes_every_check(shared):
    outcome = validate(clean_frame())
    failed = [r.check_id for r in outcome.results if not r.success]
    assert failed == [] and not outcome.rejected
    ph = result(outcome, "ph_range")
    assert (ph.element_count, ph.unexpected_count, ph.unexpected_percent) == (20, 0, 0.0)


def test_range_bounds_are_inclusive(shared):
    # pH 6.5 and 8.0 are the limits of the possible range (common practice): inside; 6.49 is not.
    frame = with_values(with_values(clean_frame(), "ph", 6.5, 2), "ph", 8.0, 1)
    assert result(validate(frame), "ph_range").success
    assert result(validate(with_values(clean_frame(), "ph", 6.49, 1)), "ph_range").unexpected_count == 1


def test_critical_range_failing_for_most_rows_rejects_the_batch(shared):
    outcome = validate(with_values(clean_frame(10), "ph", 6.2, 8))
    assert outcome.rejected
    ph = result(outcome, "ph_range")
    assert (ph.success, ph.blocking, ph.unexpected_count, ph.unexpected_percent) == (False, True, 8, 80.0)
    assert outcome.message.startswith("export.csv: ")
    assert "ph_range 80.0 % unexpected" in outcome.message
    assert "6.2" not in outcome.message  # no cell values in messages
    with pytest.raises(Exception, match="ph_range") as err:
        outcome.raise_if_rejected()
    assert err.value.reason_code == CONTRACT_FAILED  # type: ignore[attr-defined]


def test_rejection_needs_more_than_half_and_at_least_five_rows(shared):
    # Threshold from [contract] in pipeline/catalogue.toml: > 50 % and >= 5 rows (common practice).
    settings = load_settings()
    assert (settings.reject_unexpected_percent, settings.min_failing_rows) == (50.0, 5)
    half = validate(with_values(clean_frame(10), "pao2_mmhg", 900.0, 5))
    assert not result(half, "pao2_mmhg_range").success and not half.rejected
    more = validate(with_values(clean_frame(10), "pao2_mmhg", 900.0, 6))
    assert more.rejected
    few = validate(with_values(clean_frame(4), "pao2_mmhg", 900.0, 4))  # 100 %, but only 4 rows
    assert not result(few, "pao2_mmhg_range").success and not few.rejected


def test_warning_checks_never_reject(shared):
    outcome = validate(with_values(clean_frame(10), "spo2_pct", 30.0, 10))
    spo2 = result(outcome, "spo2_pct_range")
    assert (spo2.success, spo2.severity, spo2.unexpected_percent) == (False, "warning", 100.0)
    assert not outcome.rejected


def test_missing_values_are_not_tested_by_ranges_but_required_ones_count(shared):
    frame = with_values(with_values(clean_frame(10), "fio2", None, 7), "collected_at", None, 2)
    outcome = validate(frame)
    fio2 = result(outcome, "fio2_range")
    assert (fio2.success, fio2.missing_count, fio2.unexpected_count) == (True, 7, 0)
    required = result(outcome, "collected_at_not_null")
    assert (required.success, required.unexpected_count, required.unexpected_percent) == (False, 2, 20.0)
    assert not outcome.rejected


def test_missing_required_column_rejects_and_names_it(shared):
    outcome = validate(clean_frame().drop("collected_at"))
    assert outcome.rejected
    assert (
        outcome.message
        == "export.csv: the batch contract failed badly: columns_present (column(s) missing: collected_at)"
    )
    assert result(outcome, "collected_at_not_null").observed == "column missing"


def test_wrong_column_type_rejects(shared):
    outcome = validate(clean_frame().with_columns(pl.col("ph").cast(pl.String)))
    ph_type = result(outcome, "ph_type")
    assert not ph_type.success and ph_type.blocking
    assert ph_type.observed == "observed type str"
    # The range check cannot run on text: reported as such, and it blocks too (critical).
    ph_range = result(outcome, "ph_range")
    assert (ph_range.success, ph_range.blocking, ph_range.observed) == (False, True, "could not be evaluated")
    assert outcome.message.endswith("ph_type (observed type str); ph_range (could not be evaluated)")


def test_collection_time_window_and_order(shared):
    # Not before 1990-01-01, not later than the run plus 10 minutes of clock tolerance ([contract]).
    early = validate(with_values(clean_frame(20), "collected_at", datetime(1989, 12, 31), 1))
    assert result(early, "collected_at_window").unexpected_count == 1
    future = validate(with_values(clean_frame(20), "collected_at", NOW + timedelta(minutes=11), 2))
    assert result(future, "collected_at_window").unexpected_count == 2
    tolerated = validate(with_values(clean_frame(20), "collected_at", NOW + timedelta(minutes=9), 2))
    assert result(tolerated, "collected_at_window").success
    # resulted_at >= collected_at for at least 95 % of rows (mostly=0.95): 1 of 20 passes, 2 fail.
    one = with_values(clean_frame(20), "resulted_at", NOW - timedelta(days=30), 1)
    assert result(validate(one), "resulted_after_collected").success
    two = validate(with_values(clean_frame(20), "resulted_at", NOW - timedelta(days=30), 2))
    order = result(two, "resulted_after_collected")
    assert (order.success, order.severity, order.unexpected_percent, two.rejected) == (False, "warning", 10.0, False)


def test_pandas_batch_uses_the_fast_dtypes():
    frame = pl.DataFrame(
        {"t": [datetime(2026, 1, 1)], "f": [1.5], "i": [3], "s": ["x"]},
        schema={"t": pl.Datetime("us"), "f": pl.Float32, "i": pl.Int32, "s": pl.String},
    )
    dtypes = {name: str(dtype) for name, dtype in pandas_batch(frame).dtypes.items()}
    assert dtypes == {"t": "datetime64[ns]", "f": "float64", "i": "int64", "s": "str"}


def test_validation_uses_no_network_and_writes_no_files(shared, monkeypatch, tmp_path):
    attempts: list[str] = []

    def refuse(name: str):
        def blocked(*args: object, **kwargs: object) -> None:
            attempts.append(name)
            raise OSError(f"network use in a test: {name}")

        return blocked

    for name in ("connect", "connect_ex"):
        monkeypatch.setattr(socket.socket, name, refuse(f"socket.{name}"))
    monkeypatch.setattr(socket, "getaddrinfo", refuse("getaddrinfo"))
    monkeypatch.setattr(socket, "create_connection", refuse("create_connection"))
    monkeypatch.chdir(tmp_path)
    settings = load_settings()
    validator = build_validator(settings)  # a fresh context and suite, built under the ban
    outcome = validate_frame(clean_frame(), "export.csv", now=NOW, validator=validator, settings=settings)
    assert not outcome.rejected
    assert attempts == []
    assert os.environ["GX_ANALYTICS_ENABLED"] == "False"
    assert validator.context.config.analytics_enabled is False
    assert list(tmp_path.iterdir()) == []  # ephemeral context: nothing written


# --- the contract inside a file load ------------------------------------------------


@pytest.fixture
def store(tmp_path: Path) -> Iterator[duckdb.DuckDBPyConnection]:
    con = open_store(tmp_path / "store.duckdb")
    yield con
    con.close()


@pytest.fixture
def minimal() -> Profile:
    return load_profile(FIXTURES / "profiles" / "minimal.toml")


def export(tmp_path: Path, name: str, phs: list[float]) -> Path:
    path = tmp_path / name
    body = "".join(ROW.format(n=i, m=i + 5, ph=ph) for i, ph in enumerate(phs, start=1))
    path.write_text(HEADER + body, encoding="utf-8")
    return path


def contract_rows(con: duckdb.DuckDBPyConnection, sha256: str) -> pl.DataFrame:
    return con.sql("select * from contract_results where file_sha256 = ? order by check_id", params=[sha256]).pl()


def test_loaded_and_rejected_files_both_keep_their_results(shared, store, tmp_path, minimal):
    good = ingest_file(store, export(tmp_path, "good.csv", [7.40] * 9 + [6.2]), minimal, "run-1", KEY)
    bad = ingest_file(store, export(tmp_path, "bad.csv", [6.2] * 10), minimal, "run-1", KEY)
    checks = len(contract_checks(load_settings()))

    assert (good.outcome, good.rows_loaded) == ("loaded", 10)
    kept = contract_rows(store, good.sha256)
    assert kept.height == checks and set(kept["run_id"]) == {"run-1"}
    ph = kept.filter(pl.col("check_id") == "ph_range").row(0, named=True)
    assert (ph["success"], ph["blocking"], ph["unexpected_count"], ph["unexpected_percent"]) == (False, False, 1, 10.0)
    assert ph["source_file"].endswith("good.csv") and ph["observed"] == "1 of 10 values outside 6.5-8"

    assert (bad.outcome, bad.reason_code) == ("rejected", CONTRACT_FAILED)
    assert bad.message is not None and bad.message.startswith("bad.csv: ") and "ph_range 100.0 %" in bad.message
    assert store.execute("select count(*) from records where file_sha256 = ?", [bad.sha256]).fetchall() == [(0,)]
    assert store.execute("select count(*) from ingested_files where file_sha256 = ?", [bad.sha256]).fetchall() == [(0,)]
    rejected = contract_rows(store, bad.sha256)
    assert rejected.height == checks
    assert rejected.filter(pl.col("blocking"))["check_id"].to_list() == ["ph_range"]


def test_no_identifier_reaches_the_contract_results(shared, store, tmp_path, minimal):
    loaded = ingest_file(store, export(tmp_path, "good.csv", [7.40] * 10), minimal, "run-1", KEY)
    rejected = ingest_file(store, export(tmp_path, "bad.csv", [6.2] * 10), minimal, "run-1", KEY)
    text = " ".join(str(value) for row in store.execute("select * from contract_results").fetchall() for value in row)
    text += f" {loaded.message} {rejected.message}"
    assert "ACC-5" not in text and "MRN-88" not in text


# --- every row counted in SQL, great-expectations on a sample ------------------------


def stage_outcome(frame: pl.DataFrame) -> ContractOutcome:
    """The frame as a file's stage table, checked the way a load checks it."""
    con = duckdb.connect()
    try:
        staged = frame.with_row_index("source_row", offset=1)
        con.register("frame", staged.to_arrow())
        con.execute(f"create temp table {BATCH_RELATION} as select * from frame")
        return validate_stage(con, Path("export.csv"), "r1", "abc", now=NOW)
    finally:
        con.close()


FRAMES = {
    "clean": lambda: clean_frame(),
    "ph mostly bad": lambda: with_values(clean_frame(10), "ph", 6.2, 8),
    "pao2 half": lambda: with_values(clean_frame(10), "pao2_mmhg", 900.0, 5),
    "pao2 few": lambda: with_values(clean_frame(4), "pao2_mmhg", 900.0, 4),
    "spo2 warning": lambda: with_values(clean_frame(10), "spo2_pct", 30.0, 10),
    "missing values": lambda: with_values(with_values(clean_frame(10), "fio2", None, 7), "collected_at", None, 2),
    "bounds": lambda: with_values(with_values(clean_frame(), "ph", 6.5, 2), "ph", 8.0, 1),
    "early": lambda: with_values(clean_frame(20), "collected_at", datetime(1989, 12, 31), 1),
    "future": lambda: with_values(clean_frame(20), "collected_at", NOW + timedelta(minutes=11), 2),
    "resulted early": lambda: with_values(clean_frame(20), "resulted_at", NOW - timedelta(days=30), 2),
    "unknown code": lambda: with_values(clean_frame(10), "o2_device", "jetpack", 6),
    "missing column": lambda: clean_frame().drop("collected_at"),
}


@pytest.mark.parametrize("name", list(FRAMES))
def test_sql_counts_over_every_row_agree_with_great_expectations(shared, name):
    # The oracle is great-expectations itself, validating the whole frame.
    frame = FRAMES[name]()
    expected, got = validate(frame), stage_outcome(frame)
    assert [vars(r) for r in got.results] == [vars(r) for r in expected.results]
    assert got.rejected == expected.rejected


def test_value_checks_see_rows_beyond_the_sample(shared, monkeypatch):
    import pipeline.contract as contract_module

    monkeypatch.setattr(contract_module, "SAMPLE_ROWS", 5)
    # The first 5 rows are clean; 8 of the 10 later ones have an impossible pH.
    frame = pl.concat([clean_frame(5), with_values(clean_frame(10), "ph", 6.2, 8)])
    outcome = stage_outcome(frame)
    ph = result(outcome, "ph_range")
    assert (ph.element_count, ph.unexpected_count) == (15, 8)
    assert ph.unexpected_percent == pytest.approx(100 * 8 / 15)
    # 8 of 15 is more than half, and at least 5 rows: rejected (common practice thresholds),
    # although the sample great-expectations saw was clean.
    assert ph.blocking and outcome.rejected


def test_a_site_can_override_the_contract_thresholds(tmp_path):
    from pipeline.config import load_config
    from pipeline.errors import ConfigError

    profile = FIXTURES / "profiles" / "minimal.toml"
    base = f'[[inputs]]\npath = "in"\nprofile = "{profile.as_posix()}"\n'
    site = tmp_path / "site.toml"
    site.write_text(base + "[contract]\nreject_unexpected_percent = 20.0\nmin_failing_rows = 2\n", encoding="utf-8")
    settings = load_config(site).contract
    assert (settings.reject_unexpected_percent, settings.min_failing_rows) == (20.0, 2)
    assert settings.earliest_collected_at == load_settings().earliest_collected_at  # the rest from the catalogue
    outcome = validate_stage_with(with_values(clean_frame(10), "pao2_mmhg", 900.0, 3), settings)
    assert outcome.rejected  # 30 % of rows, 3 rows: rejected under the site's thresholds, not the defaults
    for bad in ("reject_unexpected_percent = 150", 'min_failing_rows = "5"', "earliest = 1990-01-01",
                'earliest_collected_at = "1990"'):  # fmt: skip
        site.write_text(base + f"[contract]\n{bad}\n", encoding="utf-8")
        with pytest.raises(ConfigError, match=r"\[contract\]"):
            load_config(site)


def validate_stage_with(frame: pl.DataFrame, settings) -> ContractOutcome:
    con = duckdb.connect()
    try:
        con.register("frame", frame.with_row_index("source_row", offset=1).to_arrow())
        con.execute(f"create temp table {BATCH_RELATION} as select * from frame")
        return validate_stage(con, Path("export.csv"), "r1", "abc", now=NOW, settings=settings)
    finally:
        con.close()
