"""Nightly operation: incremental runs, rebuilds, one run at a time, crash safety, free
disk space, provenance and logs.

The crash and locking tests start real ``abg-audit run`` processes. A run started with
``ABG_AUDIT_TEST_PAUSE_AT=<stage>`` sleeps at that named point (``pipeline/testhooks.py``)
and writes a signal file, so the test kills it with SIGKILL at a known place and then
checks what the next run finds.
"""

from __future__ import annotations

import io
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
import zipfile
from collections import namedtuple
from pathlib import Path

import duckdb
import polars as pl
import pytest
from click.testing import CliRunner

import pipeline.run as run_module
from pipeline.cli import main
from pipeline.config import SiteConfig, load_config
from pipeline.errors import ConfigError, StorageError
from pipeline.log import Log
from pipeline.preflight import MIB, MIN_FREE_OUTPUT_BYTES, MIN_FREE_STORE_BYTES, required_space
from pipeline.rules import load_catalogue
from pipeline.run import RunResult, run_pipeline
from pipeline.store import open_store
from tests.nightly_site import HEADER, add_day, cli, env, keep_umask, make_site, run_cli, store_totals

__all__ = ["keep_umask"]  # an autouse fixture

PAUSE_TIMEOUT_S = 180  # a safety net for a hung child, not a timing assertion


def run_here(config_path: Path, *, rebuild: bool = False) -> RunResult:
    return run_pipeline(load_config(config_path), Log(stream=io.StringIO()), rebuild=rebuild)


def config_of(config_path: Path) -> SiteConfig:
    return load_config(config_path)


def one(store: Path, sql: str) -> object:
    con = duckdb.connect(str(store), read_only=True)
    try:
        return con.execute(sql).fetchall()[0][0]
    finally:
        con.close()


def start_paused(config_path: Path, stage: str, tmp_path: Path) -> subprocess.Popen[str]:
    """Start a real run that sleeps at ``stage``; return once it is there."""
    signal_file = tmp_path / f"paused-{stage.replace(':', '-')}"
    signal_file.unlink(missing_ok=True)
    child = subprocess.Popen(
        cli("run", "--config", str(config_path)),
        env=env(ABG_AUDIT_TEST_PAUSE_AT=stage, ABG_AUDIT_TEST_PAUSE_SIGNAL=str(signal_file)),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    deadline = time.monotonic() + PAUSE_TIMEOUT_S
    while not signal_file.exists():
        if child.poll() is not None:
            out, err = child.communicate()
            pytest.fail(f"run ended (exit {child.returncode}) before reaching {stage}:\n{out}\n{err}")
        if time.monotonic() > deadline:
            child.kill()
            child.communicate()
            pytest.fail(f"run did not reach {stage}")
        time.sleep(0.05)
    return child


def kill(child: subprocess.Popen[str]) -> None:
    child.send_signal(signal.SIGKILL)
    child.communicate()
    assert child.returncode == -signal.SIGKILL


def outputs(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def assert_complete(path: Path) -> None:
    """A whole output file of its kind: readable to its end."""
    if path.suffix == ".parquet":
        pl.read_parquet(path)
    elif path.suffix == ".csv":
        pl.read_csv(path, infer_schema=False)
    elif path.suffix == ".xlsx":
        with zipfile.ZipFile(path) as book:
            assert book.testzip() is None
    elif path.suffix == ".html":
        assert path.read_text(encoding="utf-8").rstrip().endswith("</html>")


# --------------------------------------------------------------------------------------
# Incremental runs and rebuilds
# --------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def reference(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    """Totals of a clean run over every file of the test site, in one go."""
    config = make_site(tmp_path_factory.mktemp("reference"))
    result = run_here(config)
    assert result.exit_code == 65  # the site has one rejected file
    return store_totals(config_of(config).store_path)


def test_reference_run_holds_what_the_site_delivers(reference):
    # 3 days x (30 rows + 3 failing rows) + 2 repeated rows; the rejected file adds nothing.
    assert reference["records"] == reference["distinct_samples"] == 90
    assert reference["quarantine"] == 9
    assert reference["merged_duplicates"] == 2
    assert reference["derived"] == reference["audit_status"] == 90
    assert reference["flags"] > 0
    assert reference["duplicate_flag_rows"] == 0


def test_run_with_nothing_new_reads_no_file_and_changes_nothing(tmp_path, monkeypatch, reference):
    config_path = make_site(tmp_path / "site")
    run_here(config_path)
    config = config_of(config_path)
    before = store_totals(config.store_path)

    def no_reading(con: duckdb.DuckDBPyConnection, path: Path, *args: object, **kwargs: object) -> object:
        if "rejected" not in path.name:  # a rejected file is not in the ledger: tried again
            raise AssertionError(f"{path.name} was read although it is unchanged")
        return real_ingest(con, path, *args, **kwargs)

    real_ingest = run_module.ingest_file
    monkeypatch.setattr(run_module, "ingest_file", no_reading)
    result = run_here(config_path)
    assert result.scope_size == 0
    assert [f.outcome for f in result.files] == ["already_loaded"] * 3 + ["rejected"]
    assert store_totals(config.store_path) == before == reference
    # The rejected file is retried, so the audit is rebuilt; with no rejected file it is not.
    (config_path.parent / "exports" / "day99_rejected.csv").unlink()
    run_here(config_path)
    published = {p: (p.stat().st_mtime_ns, p.read_bytes()) for p in config.output_folder.rglob("*") if p.is_file()}
    again = run_here(config_path)
    assert again.exit_code == 0 and again.scope_size == 0
    assert {p: (p.stat().st_mtime_ns, p.read_bytes()) for p in config.output_folder.rglob("*") if p.is_file()} == (
        published
    )


def test_touched_file_is_hashed_again_and_recognised(tmp_path):
    config_path = make_site(tmp_path / "site", rejected_file=False)
    run_here(config_path)
    day1 = config_path.parent / "exports" / "day01.csv"
    os.utime(day1, ns=(day1.stat().st_atime_ns, day1.stat().st_mtime_ns + 10**9))
    result = run_here(config_path)
    assert [f.outcome for f in result.files] == ["already_loaded"] * 3
    assert result.scope_size == 0


def test_new_day_checks_only_its_samples_and_their_patients(tmp_path):
    config_path = make_site(tmp_path / "site", rejected_file=False)
    run_here(config_path)
    add_day(config_path.parent, 4)
    result = run_here(config_path)
    assert [f.outcome for f in result.files] == ["already_loaded"] * 3 + ["loaded"]
    # 30 new samples plus the repeated day-3 row (a duplicate, not loaded); patients are per day.
    assert result.scope_size == 30
    store = config_of(config_path).store_path
    assert one(store, "select count(*) from records") == 120
    assert one(store, "select count(*) from derived") == 120


def test_rebuild_rechecks_every_sample_with_the_same_result(tmp_path, reference):
    config_path = make_site(tmp_path / "site")
    run_here(config_path)
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path), "--rebuild"], env=env())
    assert outcome.exit_code == 65, outcome.output
    store = config_of(config_path).store_path
    assert one(store, "select samples_in_scope from runs where rebuild order by started_at desc limit 1") == 90
    assert store_totals(store) == reference


def test_changed_thresholds_recheck_every_sample(tmp_path):
    config_path = make_site(tmp_path / "site", rejected_file=False)
    run_here(config_path)
    with config_path.open("a", encoding="utf-8") as handle:
        handle.write("\n[thresholds.derive]\nrq = 0.9\n")
    result = run_here(config_path)
    assert result.scope_size == 90
    store = config_of(config_path).store_path
    assert one(store, "select list(rebuild order by started_at) from runs") == [False, True]
    assert run_here(config_path).scope_size == 0


# --------------------------------------------------------------------------------------
# One run at a time
# --------------------------------------------------------------------------------------


@pytest.mark.slow
def test_second_run_exits_75_while_a_run_holds_the_lock_and_files_are_owner_only(tmp_path):
    config_path = make_site(tmp_path / "site")
    store = config_of(config_path).store_path
    first = start_paused(config_path, "load:2", tmp_path)
    try:
        # While the first run is inside a file's transaction: the store, its write-ahead log
        # and the lock are readable by their owner only, in an owner-only folder.
        created = [store.parent, *store.parent.iterdir()]
        assert {p.name for p in created} >= {store.name, store.name + ".wal", store.name + ".lock"}
        for path in created:
            assert path.stat().st_mode & 0o077 == 0, f"{path.name}: {path.stat().st_mode:o}"
        second = run_cli("run", "--config", str(config_path), timeout=120)
        assert first.poll() is None  # the first run is still asleep: the second did not wait for it
    finally:
        kill(first)
    assert second.returncode == 75
    assert second.stderr.startswith("error: another run is in progress (pid ")
    assert f"(pid {first.pid})" in second.stderr
    assert "Traceback" not in second.stderr and second.stdout == ""
    # The second run wrote nothing; the first was killed mid-run, and no stale lock remains.
    assert one(store, "select list(outcome) from runs") == ["running"]
    result = run_here(config_path)
    assert result.exit_code == 65
    assert one(store, "select list(outcome order by started_at) from runs") == [
        "interrupted",
        "completed_with_rejections",
    ]


HOLDER = """
import sys, time, duckdb
con = duckdb.connect(sys.argv[1], read_only=sys.argv[2] == "ro")
print("open", flush=True)
time.sleep(600)
"""


@pytest.mark.slow
@pytest.mark.parametrize("mode", ["ro", "rw"])
def test_run_exits_75_when_another_program_holds_the_store(tmp_path, mode):
    config_path = make_site(tmp_path / "site", days=1, rejected_file=False)
    store = config_of(config_path).store_path
    store.parent.mkdir(mode=0o700)
    duckdb.connect(str(store)).close()
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLDER, str(store), mode], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "open"
        result = run_cli("run", "--config", str(config_path), timeout=120)
    finally:
        kill(holder)
    assert result.returncode == 75
    assert result.stderr.startswith(f"error: the store {store.name} is in use by another process (pid {holder.pid})")
    assert "Traceback" not in result.stderr and len(result.stderr.splitlines()) == 1


# --------------------------------------------------------------------------------------
# Crash safety: SIGKILL at named points, then an unattended re-run
# --------------------------------------------------------------------------------------


@pytest.mark.slow
@pytest.mark.parametrize(
    "stage",
    [
        "load:2",  # inside the second new file's transaction (the first has committed)
        "rules",  # derived metrics and flags written, not committed
        "report:3",  # two output files replaced, the third written under its temporary name
        "checkpoint",  # everything committed and recorded, the write-ahead log not yet merged
    ],
)
def test_killed_run_leaves_a_consistent_store_and_the_next_run_completes(stage, tmp_path, reference):
    root = tmp_path / "site"
    config_path = make_site(root, days=1, rejected_file=False)
    run_here(config_path)  # an earlier night: its outputs are the "old" ones
    config = config_of(config_path)
    old = outputs(config.output_folder)
    make_site(root)  # tonight's delivery: days 2 and 3 and a rejected file

    kill(start_paused(config_path, stage, tmp_path))

    # The store opens and holds whole files only: no duplicate sample, no orphan row.
    con = duckdb.connect(str(config.store_path), read_only=True)
    try:
        rows = lambda sql: con.execute(sql).fetchall()[0][0]  # noqa: E731
        assert rows("select count(*) - count(distinct sample_id) from records") == 0
        assert rows("select count(*) from records anti join ingested_files using (file_sha256)") == 0
        assert rows("select count(*) from quarantine anti join ingested_files using (file_sha256)") == 0
        loaded_files = rows("select count(*) from ingested_files")
    finally:
        con.close()
    assert loaded_files == {"load:2": 2, "rules": 3, "report:3": 3, "checkpoint": 3}[stage]

    # Every output is the old file or a complete new one, never half written.
    for name, content in outputs(config.output_folder).items():
        path = config.output_folder / name
        if path.name.startswith("."):
            continue  # the temporary file being written when the run died
        if name in old and content == old[name]:
            continue
        assert_complete(path)
    if stage != "checkpoint":  # the report is the last file written
        assert (config.output_folder / "audit_report.html").read_bytes() == old["audit_report.html"]

    result = run_here(config_path)
    assert result.exit_code == 65
    assert store_totals(config.store_path) == reference
    assert not config.store_path.with_name(config.store_path.name + ".wal").exists()  # checkpointed at the end
    assert not [p for p in config.output_folder.rglob(".*") if p.is_file()]  # no temporary file left over
    for path in config.output_folder.rglob("*"):
        if path.is_file():
            assert_complete(path)
    killed = "completed_with_rejections" if stage == "checkpoint" else "interrupted"
    assert one(config.store_path, "select list(outcome order by started_at) from runs") == [
        "succeeded",
        killed,
        "completed_with_rejections",
    ]


# --------------------------------------------------------------------------------------
# Free disk space
# --------------------------------------------------------------------------------------

Usage = namedtuple("Usage", "total used free")


def test_too_little_disk_space_stops_the_run_before_it_writes(tmp_path, monkeypatch):
    config_path = make_site(tmp_path / "site")
    config = config_of(config_path)
    low = Usage(10**12, 10**12 - 100 * MIB, 100 * MIB)
    monkeypatch.setattr(shutil, "disk_usage", lambda _path: low)
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path)], env=env())
    assert outcome.exit_code == 74
    message = outcome.output.strip()
    assert message.startswith(f"error: not enough free disk space in {config.store_path.parent}: 100 MiB free")
    assert "nothing was written" in message and len(message.splitlines()) == 1
    assert not config.store_path.exists() and not config.output_folder.exists()
    # An existing store: the run stops before it records anything.
    monkeypatch.undo()
    run_here(config_path)
    before = store_totals(config.store_path)
    add_day(config_path.parent, 4)
    monkeypatch.setattr(shutil, "disk_usage", lambda _path: low)
    with pytest.raises(StorageError, match="not enough free disk space") as caught:
        run_here(config_path)
    assert caught.value.exit_code == 74
    assert one(config.store_path, "select count(*) from runs") == 1
    assert store_totals(config.store_path) == before


def test_space_needed_grows_with_new_input_and_counts_one_disk_once(tmp_path):
    (tmp_path / "out").mkdir()
    small = required_space(tmp_path / "store", tmp_path / "out", new_input_bytes=1 * MIB)
    big = required_space(tmp_path / "store", tmp_path / "out", new_input_bytes=1000 * MIB)
    assert list(small) == [tmp_path]  # both folders on one file system: one need, summed
    assert small[tmp_path] == MIN_FREE_STORE_BYTES + MIN_FREE_OUTPUT_BYTES  # the floor
    assert big[tmp_path] == 3 * 1000 * MIB + MIN_FREE_OUTPUT_BYTES  # three times the new input
    rebuild = required_space(tmp_path / "store", tmp_path / "out", new_input_bytes=1000 * MIB, store_bytes=500 * MIB)
    assert rebuild[tmp_path] == big[tmp_path] + 500 * MIB


def test_store_folder_open_to_others_is_a_configuration_error(tmp_path):
    config_path = make_site(tmp_path / "site")
    store = config_of(config_path).store_path
    store.parent.mkdir(mode=0o700)
    store.parent.chmod(0o755)
    with pytest.raises(ConfigError, match="chmod 700"):
        run_here(config_path)
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path)], env=env())
    assert outcome.exit_code == 78


# --------------------------------------------------------------------------------------
# Provenance and failures
# --------------------------------------------------------------------------------------


def test_runs_table_records_versions_counts_and_duration(tmp_path):
    config_path = make_site(tmp_path / "site")
    result = run_here(config_path)
    catalogue = load_catalogue()
    con = duckdb.connect(str(config_of(config_path).store_path), read_only=True)
    try:
        cursor = con.execute("select * from runs")
        row = dict(zip([d[0] for d in cursor.description], cursor.fetchall()[0], strict=True))
        flags, flagged = con.execute("select count(*), count(distinct sample_id) from flags").fetchall()[0]
    finally:
        con.close()
    assert row["outcome"] == "completed_with_rejections" and row["exit_code"] == 65
    assert (row["catalogue_version"], row["catalogue_sha256"]) == (catalogue.version, catalogue.sha256)
    assert row["config_sha256"] == config_of(config_path).sha256
    assert len(row["pseudonym_key_id"]) == 12
    assert row["duration_s"] >= 0 and row["finished_at"] >= row["started_at"]
    assert (row["samples_in_scope"], row["flags_written"], row["samples_flagged"]) == (90, flags, flagged)
    assert (row["records_total"], row["quarantine_total"], row["flags_total"]) == (90, 9, flags)
    assert (row["rows_in"], row["rows_loaded"], row["rows_quarantined"]) == (101, 90, 9)
    inputs = json.loads(row["inputs"])
    assert len(inputs) == 4 and all(len(i["sha256"]) == 64 for i in inputs if i["outcome"] != "rejected")
    assert row["run_id"] == result.run_id
    listing = CliRunner().invoke(main, ["runs", "--config", str(config_path)])
    assert listing.exit_code == 0
    assert f"rules v{catalogue.version}" in listing.output and "90 samples checked" in listing.output


# One finding of each other kind beside the site's data-quality flags: PaO2 50 mmHg on room
# air (hypoxaemia, clinical), no FiO2 nor device (documentation), PaO2 250 mmHg on oxygen
# (hyperoxaemia, clinical).
OTHER_KINDS = (
    "C-1,P8001,W1,2026-03-01 10:00,2026-03-01 10:10,A,RA,0.21,7.40,40,50,24\n"
    "C-2,P8002,W1,2026-03-01 10:00,2026-03-01 10:10,A,,,7.40,40,85,24\n"
    "C-3,P8003,W1,2026-03-01 10:00,2026-03-01 10:10,A,NC,0.4,7.40,40,250,24\n"
)


def test_runs_separate_data_quality_documentation_and_clinical_flags(tmp_path):
    config_path = make_site(tmp_path / "site", days=1, rejected_file=False)
    (config_path.parent / "exports" / "other_kinds.csv").write_text(HEADER + OTHER_KINDS, encoding="utf-8")
    run_here(config_path)
    store = config_of(config_path).store_path
    con = duckdb.connect(str(store), read_only=True)
    try:
        by_kind = dict(con.execute("select kind, count(*) from flags group by kind").fetchall())
        dq, documentation, clinical, written = con.execute(
            "select flags_data_quality, flags_documentation, flags_clinical, flags_written from runs"
        ).fetchall()[0]
    finally:
        con.close()
    assert (dq, documentation, clinical) == (by_kind["data_quality"], 1, 2)
    assert dq + documentation + clinical == written
    listing = CliRunner().invoke(main, ["runs", "--config", str(config_path)])
    assert (
        f"flags on the samples checked: {dq} data quality (for the laboratory to review), 1 documentation, 2 clinical"
        in listing.output
    )
    # A second run with nothing new checks no sample and says so by kind too.
    run_here(config_path)
    assert one(store, "select list(flags_clinical order by started_at) from runs") == [2, 0]


def test_an_older_store_gains_the_flag_kind_columns_of_runs(tmp_path):
    store = tmp_path / "store" / "old.duckdb"
    open_store(store).close()
    con = duckdb.connect(str(store))
    for column in ("flags_data_quality", "flags_documentation", "flags_clinical"):
        con.execute(f"alter table runs drop column {column}")
    con.close()
    open_store(store).close()
    con = duckdb.connect(str(store), read_only=True)
    try:
        names = {row[0] for row in con.execute("select column_name from information_schema.columns "
                                                  "where table_name = 'runs'").fetchall()}
    finally:
        con.close()
    assert {"flags_data_quality", "flags_documentation", "flags_clinical"} <= names


def test_the_sites_contract_thresholds_apply_to_runs_and_to_check_profile(tmp_path):
    # Every sample of the site is collected in March 2026: a site that starts its window on
    # 2026-04-01 rejects the file by its batch contract (collected_at_window is critical).
    config_path = make_site(tmp_path / "site", days=1, rejected_file=False)
    with config_path.open("a", encoding="utf-8") as handle:
        handle.write("\n[contract]\nearliest_collected_at = 2026-04-01\n")
    result = run_here(config_path)
    assert [(f.outcome, f.reason_code) for f in result.files] == [("rejected", "CONTRACT_FAILED")]
    day = str(config_path.parent / "exports" / "day01.csv")
    profile = str(config_path.parent / "profile.toml")
    with_site = CliRunner().invoke(main, ["check-profile", profile, day, "--config", str(config_path)])
    assert with_site.exit_code == 65 and "(CONTRACT_FAILED)" in with_site.output
    without = CliRunner().invoke(main, ["check-profile", profile, day])
    assert without.exit_code == 0, without.output


def test_unexpected_error_is_one_line_without_its_message_and_the_run_is_marked_failed(tmp_path, monkeypatch):
    config_path = make_site(tmp_path / "site", rejected_file=False)

    def broken(*_args: object, **_kwargs: object) -> None:
        raise ValueError("could not convert 'P0101' in row 3")

    monkeypatch.setattr(run_module, "build_and_write", broken)
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path)], env=env())
    assert outcome.exit_code == 70
    assert outcome.stderr.splitlines()[-1].startswith("error: internal error (ValueError at test_nightly.py:")
    assert "P0101" not in outcome.output and "Traceback" not in outcome.output
    store = config_of(config_path).store_path
    assert one(store, "select outcome || ' ' || exit_code || ' ' || error from runs") == (
        "failed 70 internal error (ValueError)"
    )
    # The records and the analysis committed before the failure are kept; the next run
    # finds nothing new to load but rebuilds the outputs the failed run did not write.
    monkeypatch.undo()
    result = run_here(config_path)
    assert result.exit_code == 0 and result.scope_size == 0
    assert (config_of(config_path).output_folder / "audit_report.html").exists()


def test_missing_input_folder_exits_66_and_is_recorded(tmp_path):
    config_path = make_site(tmp_path / "site")
    shutil.rmtree(config_path.parent / "exports")
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path)], env=env())
    assert outcome.exit_code == 66
    assert outcome.stderr.splitlines()[-1].startswith("error: no input found: ")
    store = config_of(config_path).store_path
    assert one(store, "select outcome || ' ' || exit_code from runs") == "no_input 66"


def test_one_missing_input_among_present_ones_still_exits_66(tmp_path):
    # A vanished export drop must alert even when the other inputs load (operations guide).
    config_path = make_site(tmp_path / "site", rejected_file=False)
    text = config_path.read_text(encoding="utf-8")
    extra = text[text.index("[[inputs]]") :].replace('path = "exports"', 'path = "exports_gone"')
    config_path.write_text(text + "\n" + extra, encoding="utf-8")
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path)], env=env())
    assert outcome.exit_code == 66
    store = config_of(config_path).store_path
    assert one(store, "select outcome || ' ' || exit_code || ' ' || files_loaded from runs") == "no_input 66 3"


# --------------------------------------------------------------------------------------
# Logs
# --------------------------------------------------------------------------------------


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_shows_on_a_terminal_only():
    for stream, shown in ((Terminal(), True), (io.StringIO(), False)):
        log = Log(stream=stream)
        log.progress("[1/3] day01.csv")
        log.info("day01.csv: 33 rows in")
        log.progress("checking rules")
        log.clear_progress()
        text = stream.getvalue()
        assert ("\r" in text) is shown
        assert text.replace("\r\x1b[K", "").replace("[1/3] day01.csv", "").replace("checking rules", "") == (
            "day01.csv: 33 rows in\n"
        )
    json_log = Log("json", stream=Terminal())
    json_log.progress("checking rules")
    assert json_log.stream.getvalue() == ""


def test_json_log_lines_parse_and_name_files_not_people(tmp_path):
    config_path = make_site(tmp_path / "site")
    stream = io.StringIO()
    run_pipeline(load_config(config_path), Log("json", stream=stream))
    records = [json.loads(line) for line in stream.getvalue().splitlines()]
    assert {r["level"] for r in records} >= {"info", "error"}
    rejected = [r for r in records if r["level"] == "error"]
    assert rejected[0]["reason"] == "MISSING_COLUMN" and rejected[0]["file"] == "day99_rejected.csv"
    assert not any("P0" in line for line in stream.getvalue().splitlines())


# --------------------------------------------------------------------------------------
# Documentation
# --------------------------------------------------------------------------------------

DOCS = Path(__file__).parent.parent


def table_codes(markdown: str) -> dict[int, str]:
    """Exit code -> first words of its meaning, from the rows of a Markdown table."""
    codes = {}
    for line in markdown.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) >= 2 and cells[0].isdigit():
            codes[int(cells[0])] = first_words(cells[1])
    return codes


def first_words(meaning: str) -> str:
    return re.split(r"[:;(]", meaning, maxsplit=1)[0].strip()


def test_exit_code_tables_agree_with_the_code():
    from pipeline.cli import EXIT_CODES_HELP
    from pipeline.errors import ConfigError, FileRejected, NoInputError, PipelineError, StorageError, StoreBusyError

    raised = {
        e.exit_code for e in (PipelineError, ConfigError, NoInputError, StoreBusyError, StorageError, FileRejected)
    }
    expected = {0, *raised}
    in_help = {int(line.split()[0]): line.split(None, 1)[1] for line in EXIT_CODES_HELP.splitlines()[2:]}
    readme = table_codes((DOCS / "README.md").read_text(encoding="utf-8").split("## Exit codes", 1)[1])
    operations = table_codes((DOCS / "docs" / "operations.md").read_text(encoding="utf-8").split("## Exit codes")[1])
    assert set(in_help) == set(readme) == set(operations) == expected
    assert readme == operations
    assert {code: first_words(text) for code, text in in_help.items()} == readme
