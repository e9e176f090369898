"""Reload after a profile fix: files the store holds are read again with the current profile.

The test site (tests/nightly_site.py) first declares its exports in UTC; they were written in
New York local time. Early March 2026 New York is on EST (UTC-5; US daylight saving time
starts on the second Sunday of March, 8 March 2026: 15 U.S.C. 260a), so fixing the time zone
moves every collection time five hours later, and 02:30 on 8 March does not exist there.
"""

from __future__ import annotations

import io
import signal
import subprocess
import time
from datetime import datetime
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner

from pipeline.cli import main
from pipeline.config import load_config
from pipeline.ingest.load import ingest_file
from pipeline.log import Log
from pipeline.profile import load_profile
from pipeline.reload import REASON, HeldFile, ReloadLoader, Replacement
from pipeline.run import RunResult, run_pipeline
from pipeline.store import open_store
from tests.nightly_site import HEADER, cli, env, keep_umask, make_site

__all__ = ["keep_umask"]  # an autouse fixture

WRONG_ZONE = 'timezone = "UTC"'
RIGHT_ZONE = 'timezone = "America/New_York"'


def site_in_wrong_zone(root: Path, **kwargs: object) -> Path:
    config_path = make_site(root, rejected_file=False, **kwargs)
    profile = root / "profile.toml"
    profile.write_text(
        profile.read_text(encoding="utf-8").replace('timezone = "Europe/London"', WRONG_ZONE), encoding="utf-8"
    )
    return config_path


def fix_zone(root: Path) -> None:
    profile = root / "profile.toml"
    profile.write_text(profile.read_text(encoding="utf-8").replace(WRONG_ZONE, RIGHT_ZONE), encoding="utf-8")


def run(config_path: Path, stream: io.StringIO | None = None) -> RunResult:
    return run_pipeline(load_config(config_path), Log(stream=stream or io.StringIO()))


def reload(config_path: Path, stream: io.StringIO | None = None, **kwargs: object) -> RunResult:
    config = load_config(config_path)
    loader = ReloadLoader(config, **kwargs)  # type: ignore[arg-type]
    return run_pipeline(config, Log(stream=stream or io.StringIO()), command="reload", loader=loader)


def rows(config_path: Path, sql: str, params: list[object] | None = None) -> list[tuple]:
    con = duckdb.connect(str(load_config(config_path).store_path), read_only=True)
    try:
        return con.execute(sql, params or []).fetchall()
    finally:
        con.close()


def test_reload_after_a_time_zone_fix_moves_the_times_and_keeps_the_earlier_version(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=2)
    assert run(config_path).exit_code == 0
    held_before = rows(config_path, "select file_sha256, loaded_at, profile_sha256 from ingested_files order by 1")
    assert rows(config_path, "select collected_at from records where sample_id = 'S1-1'") == [
        (datetime(2026, 3, 1, 10, 1),)
    ]

    fix_zone(root)
    profile = load_profile(root / "profile.toml")
    result = reload(config_path, profile_name="test_minimal", operator_reason="exports are New York time")
    assert result.exit_code == 0
    assert [f.outcome for f in result.files] == ["loaded", "loaded"]

    # The stored time is the New York local time in UTC; the earlier reading is kept with the reason.
    assert rows(config_path, "select collected_at, version from records where sample_id = 'S1-1'") == [
        (datetime(2026, 3, 1, 15, 1), 2)
    ]
    old = rows(
        config_path,
        "select collected_at, superseded_reason, superseded_in_run from superseded_records where sample_id = 'S1-1'",
    )
    assert len(old) == 1 and old[0][0] == datetime(2026, 3, 1, 10, 1) and old[0][2] == result.run_id
    assert old[0][1] == (
        f"{REASON} (test_minimal {held_before[0][2][:12]} -> {profile.sha256[:12]}): exports are New York time"
    )
    # Every record of both files moved, and each kept exactly one earlier version.
    assert rows(config_path, "select count(*), min(version), max(version) from records") == [(60, 2, 2)]
    assert rows(
        config_path,
        "select count(*) from superseded_records s join records r using (sample_id) "
        "where r.collected_at = s.collected_at + interval 5 hour and s.superseded_reason like 'reloaded%'",
    ) == [(60,)]
    # The ledger: same files, same first load time, the new profile hash, when and why reloaded.
    ledger = rows(
        config_path,
        "select file_sha256, loaded_at, profile_sha256, reloaded_at is not null, reload_reason, rows_loaded, "
        "rows_quarantined from ingested_files order by 1",
    )
    assert [(sha, at) for sha, at, *_ in ledger] == [(sha, at) for sha, at, _ in held_before]
    assert {(p, r, loaded, q) for _s, _a, p, r, _why, loaded, q in ledger} == {(profile.sha256, True, 30, 3)}
    # Quarantine and duplicates are the re-read's, not added to the first reading's.
    assert rows(config_path, "select count(*) from quarantine") == [(6,)]
    assert rows(config_path, "select count(*) from merged_duplicates") == [(1,)]
    # Analysed and published like a run; every record has its derived metrics and status.
    assert rows(config_path, "select command, outcome, files_loaded from runs order by started_at") == [
        ("run", "succeeded", 2),
        ("reload", "succeeded", 2),
    ]
    assert rows(config_path, "select count(*) from derived join records using (sample_id)") == [(60,)]
    assert rows(config_path, "select count(*) from audit_status") == [(60,)]

    # Read again with the same profile: nothing changes and no version is stored twice.
    again = reload(config_path, profile_name="test_minimal")
    assert again.exit_code == 0
    assert rows(config_path, "select count(*), max(version) from records") == [(60, 2)]
    assert rows(config_path, "select count(*) from superseded_records") == [(60,)]


def test_runs_warn_about_files_loaded_with_an_older_profile_until_they_are_reloaded(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=2)
    first = io.StringIO()
    run(config_path, first)
    assert "earlier version of profile" not in first.getvalue()

    fix_zone(root)
    nightly = io.StringIO()
    assert run(config_path, nightly).exit_code == 0
    warning = [line for line in nightly.getvalue().splitlines() if "earlier version of profile" in line]
    assert warning == [
        "warning: 2 file(s) in the store were loaded with an earlier version of profile 'test_minimal'; their "
        "records follow the old profile. To read them again with the current one: "
        f"abg-audit reload --config {config_path} --profile test_minimal --reason 'what was fixed'"
    ]
    # `abg-audit report` warns too (on stderr, beside its own output).
    report = CliRunner().invoke(main, ["report", "--config", str(config_path)], env=env())
    assert report.exit_code == 0, report.output
    assert "2 file(s) in the store were loaded with an earlier version of profile 'test_minimal'" in report.stderr

    after = io.StringIO()
    assert reload(config_path, after, profile_name="test_minimal").exit_code == 0
    assert "earlier version of profile" not in after.getvalue()
    later = io.StringIO()
    run(config_path, later)
    assert "earlier version of profile" not in later.getvalue()


def write_export(root: Path, name: str, lines: list[str]) -> Path:
    path = root / "exports" / name
    path.write_text(HEADER + "".join(lines), encoding="utf-8")
    return path


# 02:30 on 8 March 2026 does not exist in New York (clocks go from 02:00 to 03:00).
EARLIER = "G-1,P7001,W1,2026-03-08 03:30,2026-03-08 03:40,A,RA,0.21,7.40,40,91,24\n"
LATER_IN_GAP = "G-1,P7001,W1,2026-03-08 02:30,2026-03-08 02:40,A,RA,0.21,7.40,40,92,24\n"
OTHER = "G-2,P7002,W2,2026-03-08 05:00,2026-03-08 05:10,A,RA,0.21,7.41,41,88,24\n"


def test_a_record_the_reread_quarantines_leaves_and_an_earlier_delivery_is_current_again(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=1)
    write_export(root, "day08a.csv", [EARLIER])
    assert run(config_path).exit_code == 0
    later = write_export(root, "day08b.csv", [LATER_IN_GAP, OTHER])
    assert run(config_path).exit_code == 0  # G-1 corrected by the later delivery (PaO2 91 -> 92)
    assert rows(config_path, "select pao2_mmhg, version from records where sample_id = 'G-1'") == [(92.0, 2)]

    fix_zone(root)
    result = reload(config_path, files=[later], operator_reason="time zone")
    assert result.exit_code == 0
    assert [f.path.name for f in result.files] == ["day08b.csv"]
    # The later file's G-1 row is quarantined now; the earlier delivery's version is current again.
    assert rows(
        config_path, "select reason_code from quarantine where sample_id = 'G-1' and source_file like '%day08b%'"
    ) == [("DST_NONEXISTENT",)]
    current = "select pao2_mmhg, version, source_file like '%day08a%' from records where sample_id = 'G-1'"
    assert rows(config_path, current) == [(91.0, 3, True)]
    gone = rows(
        config_path,
        "select pao2_mmhg, superseded_reason from superseded_records where sample_id = 'G-1' "
        "and superseded_reason is not null",
    )
    assert len(gone) == 1 and gone[0][0] == 92.0
    assert gone[0][1].endswith("time zone; not a record in the re-read file (row 1 quarantined: DST_NONEXISTENT)")
    assert rows(config_path, "select count(*) from superseded_records where sample_id = 'G-1'") == [(1,)]
    # Its derived metrics and flags follow the version held now.
    assert rows(config_path, "select count(*) from derived where sample_id in ('G-1', 'G-2')") == [(2,)]
    assert rows(config_path, "select count(*) from derived anti join records using (sample_id)") == [(0,)]
    assert rows(config_path, "select count(*) from audit_status anti join records using (sample_id)") == [(0,)]


def test_a_record_gone_without_an_earlier_delivery_leaves_every_derived_table(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=1)
    only = write_export(root, "day08.csv", [LATER_IN_GAP, OTHER])
    assert run(config_path).exit_code == 0
    assert rows(config_path, "select count(*) from derived where sample_id = 'G-1'") == [(1,)]
    fix_zone(root)
    assert reload(config_path, files=[only]).exit_code == 0
    assert rows(config_path, "select count(*) from records where sample_id = 'G-1'") == [(0,)]
    for table in ("derived", "audit_status", "flags", "audit_sample_fact"):
        assert rows(config_path, f"select count(*) from {table} where sample_id = 'G-1'") == [(0,)], table
    assert rows(config_path, "select count(*) from superseded_records where sample_id = 'G-1'") == [(1,)]


def test_reloading_an_earlier_file_leaves_a_later_delivery_current_and_keeps_the_reread_as_history(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=1)
    earlier = write_export(root, "day08a.csv", [EARLIER.replace("2026-03-08 03:30", "2026-03-08 06:30")])
    run(config_path)
    write_export(root, "day08b.csv", [EARLIER.replace(",91,", ",95,"), OTHER])
    run(config_path)  # the later file corrects G-1 (PaO2 91 -> 95)
    before = rows(config_path, "select * from records where sample_id = 'G-1'")
    fix_zone(root)
    result = reload(config_path, files=[earlier], operator_reason="zone")
    assert result.exit_code == 0
    assert [f.path.name for f in result.files] == ["day08a.csv"]
    # The later delivery is still the record, exactly as it was (it was not read again).
    assert rows(config_path, "select * from records where sample_id = 'G-1'") == before
    # The earlier file's new reading (06:30 EDT = 10:30 UTC) is history, superseded by the later file.
    history = rows(
        config_path,
        "select collected_at, pao2_mmhg, superseded_by_file like '%day08b%', superseded_reason is not null "
        "from superseded_records where sample_id = 'G-1' order by superseded_reason nulls first",
    )
    assert history == [
        (datetime(2026, 3, 8, 6, 30), 91.0, True, False),  # the first reading, replaced by the correction
        (datetime(2026, 3, 8, 10, 30), 91.0, True, True),  # the re-read, with the reason
    ]
    # Read again with the same profile: nothing new to keep.
    assert reload(config_path, files=[earlier]).exit_code == 0
    assert rows(config_path, "select count(*) from superseded_records where sample_id = 'G-1'") == [(2,)]
    assert rows(config_path, "select * from records where sample_id = 'G-1'") == before
    # The later file (and day 1) were loaded with the old profile too, and the runs say so.
    stream = io.StringIO()
    run(config_path, stream)
    assert "2 file(s) in the store were loaded with an earlier version of profile 'test_minimal'" in stream.getvalue()


def test_reload_refuses_a_file_the_store_does_not_hold_and_names_missing_ones(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=1)
    run(config_path)
    stranger = write_export(root, "never_loaded.csv", [OTHER])
    refused = CliRunner().invoke(main, ["reload", "--config", str(config_path), str(stranger)], env=env())
    assert refused.exit_code == 65
    assert "never_loaded.csv is not in the store" in refused.stderr
    missing = CliRunner().invoke(
        main, ["reload", "--config", str(config_path), str(root / "exports" / "gone.csv")], env=env()
    )
    assert missing.exit_code == 66
    both = CliRunner().invoke(main, ["reload", "--config", str(config_path), "--profile", "x", str(stranger)])
    assert both.exit_code == 2 and "either export files or --profile" in both.output
    unknown = CliRunner().invoke(main, ["reload", "--config", str(config_path), "--profile", "nope"], env=env())
    assert unknown.exit_code == 78 and "'nope' is not the profile of any [[inputs]]" in unknown.stderr
    assert rows(config_path, "select count(*) from runs") == [(1,)]  # refused before a run was recorded


def test_a_reload_the_current_profile_rejects_leaves_the_file_as_it_was(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=1)
    run(config_path)
    before = rows(config_path, "select sample_id, pao2_mmhg, collected_at, version from records order by 1")
    profile = root / "profile.toml"
    profile.write_text(
        profile.read_text(encoding="utf-8").replace('paco2_mmhg = "mmHg"', 'paco2_mmhg = "kPa"'), encoding="utf-8"
    )
    outcome = CliRunner().invoke(
        main, ["reload", "--config", str(config_path), "--profile", "test_minimal"], env=env()
    )
    assert outcome.exit_code == 65, outcome.output
    assert "UNIT_MISMATCH" in outcome.output
    assert rows(config_path, "select sample_id, pao2_mmhg, collected_at, version from records order by 1") == before
    assert rows(config_path, "select count(*) from superseded_records") == [(0,)]
    assert rows(config_path, "select command, outcome, exit_code from runs order by started_at")[-1] == (
        "reload",
        "completed_with_rejections",
        65,
    )


def test_reload_from_the_command_line_records_a_reload_run(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=1)
    run(config_path)
    fix_zone(root)
    outcome = CliRunner().invoke(
        main,
        ["reload", "--config", str(config_path), str(root / "exports" / "day01.csv"), "--reason", "zone"],
        env=env(),
    )
    assert outcome.exit_code == 0, outcome.output
    assert "30 records changed, 0 unchanged, 0 no longer records" in outcome.stderr
    assert rows(config_path, "select command from runs order by started_at") == [("run",), ("reload",)]
    assert rows(config_path, "select count(*) from superseded_records where superseded_reason like '%: zone'") == [
        (30,)
    ]


@pytest.mark.slow
def test_a_reload_killed_inside_a_file_leaves_that_file_as_it_was_and_can_run_again(tmp_path):
    root = tmp_path / "site"
    config_path = site_in_wrong_zone(root, days=2)
    run(config_path)
    fix_zone(root)
    store = load_config(config_path).store_path
    before = rows(config_path, "select sample_id, collected_at, version from records order by 1")
    signal_file = tmp_path / "paused"
    child = subprocess.Popen(
        cli("reload", "--config", str(config_path), "--profile", "test_minimal"),
        env=env(ABG_AUDIT_TEST_PAUSE_AT="load:2", ABG_AUDIT_TEST_PAUSE_SIGNAL=str(signal_file)),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    deadline = time.monotonic() + 180  # a safety net for a hung child, not a timing assertion
    while not signal_file.exists() and child.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    child.send_signal(signal.SIGKILL)
    child.communicate()
    assert signal_file.exists(), "the reload never reached the second file"

    # The first file's reload committed; the second file's, killed inside its transaction, did not.
    after = {s: (at, v) for s, at, v in rows(config_path, "select sample_id, collected_at, version from records")}
    assert {s for s, (_at, v) in after.items() if v == 2} == {s for s, _at, _v in before if s.startswith("S1-")}
    assert {s for s, (_at, v) in after.items() if v == 1} == {s for s, _at, _v in before if s.startswith("S2-")}
    assert rows(config_path, "select count(*) from ingested_files where reloaded_at is not null") == [(1,)]
    assert rows(config_path, "select count(*) - count(distinct sample_id) from records") == [(0,)]
    assert store.exists()

    # Reloading again finishes the work: every record once, in the right zone.
    assert reload(config_path, profile_name="test_minimal").exit_code == 0
    totals = "select count(*), count(distinct sample_id), min(version), max(version) from records"
    assert rows(config_path, totals) == [(60, 60, 2, 2)]
    assert rows(config_path, "select collected_at from records where sample_id = 'S2-1'") == [
        (datetime(2026, 3, 2, 15, 1),)
    ]
    assert rows(config_path, "select outcome from runs where command = 'reload' order by started_at") == [
        ("interrupted",),
        ("succeeded",),
    ]


RX_PROFILE = """\
[profile]
name = "test_rx"
kind = "prescriptions"
datetime_format = "%Y-%m-%d %H:%M"
timezone = "{zone}"

[columns]
prescription_id = "id"
patient_id = "mrn"
start_at = "start"
end_at = "end"
"""
RX_EXPORT = "id,mrn,start,end\nRX1,P1,2026-03-02 09:00,\nRX2,P2,2026-03-02 10:00,2026-03-02 12:00\n"


def test_a_prescriptions_file_is_read_again_the_same_way(tmp_path):
    profile_path = tmp_path / "rx.toml"
    profile_path.write_text(RX_PROFILE.format(zone="UTC"), encoding="utf-8")
    export = tmp_path / "rx.csv"
    export.write_text(RX_EXPORT, encoding="utf-8")
    con = open_store(tmp_path / "store" / "s.duckdb")
    try:
        wrong = load_profile(profile_path)
        first = ingest_file(con, export, wrong, "r1", b"reload-test-key-0123456789abcdef")
        assert first.rows_loaded == 2
        loaded_at = con.execute("select loaded_at from ingested_files").fetchall()[0][0]
        profile_path.write_text(RX_PROFILE.format(zone="America/New_York"), encoding="utf-8")
        fixed = load_profile(profile_path)
        held = HeldFile(first.sha256, export, fixed, loaded_at, wrong.sha256)
        replacement = Replacement(held, "r2", held.reason("zone"))
        again = ingest_file(con, export, fixed, "r2", b"reload-test-key-0123456789abcdef", replacing=replacement)
        assert again.outcome == "loaded" and replacement.counts["changed"] == 2
        current = "select prescription_id, start_at, end_at, version from prescriptions order by 1"
        assert con.execute(current).fetchall() == [
            ("RX1", datetime(2026, 3, 2, 14, 0), None, 2),
            ("RX2", datetime(2026, 3, 2, 15, 0), datetime(2026, 3, 2, 17, 0), 2),
        ]
        old = con.execute(
            "select prescription_id, start_at, superseded_reason from superseded_prescriptions order by 1"
        ).fetchall()
        assert [(p, at) for p, at, _ in old] == [("RX1", datetime(2026, 3, 2, 9)), ("RX2", datetime(2026, 3, 2, 10))]
        assert all(reason.startswith(f"{REASON} (test_rx ") and reason.endswith(": zone") for *_, reason in old)
        assert con.execute("select loaded_at, profile_sha256, run_id from ingested_files").fetchall() == [
            (loaded_at, fixed.sha256, "r2")
        ]
    finally:
        con.close()
