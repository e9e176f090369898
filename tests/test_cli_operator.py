"""What an operator meets at the command line: a closed pipe, check-profile on a new
export, the pseudonym key's minimum, and the README's test command being CI's."""

from __future__ import annotations

import fcntl
import os
import re
import shutil
import subprocess
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner

from pipeline.cli import main
from pipeline.config import load_config
from pipeline.errors import ConfigError
from pipeline.pseudonym import KEY_ENV, MIN_KEY_CHARS, load_key
from tests.nightly_site import HEADER, cli, day_rows, env, keep_umask, make_site, run_cli

__all__ = ["keep_umask"]  # an autouse fixture

ROOT = Path(__file__).parent.parent
PROFILE = Path(__file__).parent / "fixtures" / "profiles" / "minimal.toml"
SMALL_PIPE = 4096  # one page: the command fills it and blocks until the reader has gone


def read_then_close(command: list[str], *, stream: str = "stdout", **extra: str) -> tuple[bytes, int, bytes]:
    """Run ``command`` with ``stream`` into a small pipe, read its first bytes (as ``head -c``
    does) and close the pipe while it is still writing; return them, the exit code and the
    other stream's text."""
    read_end, write_end = os.pipe()
    fcntl.fcntl(read_end, fcntl.F_SETPIPE_SZ, SMALL_PIPE)
    other = subprocess.PIPE
    child = subprocess.Popen(
        command,
        stdout=write_end if stream == "stdout" else other,
        stderr=write_end if stream == "stderr" else other,
        env=env(**extra),
    )
    os.close(write_end)
    with os.fdopen(read_end, "rb") as reader:
        first = reader.read(64)
    out, err = child.communicate(timeout=300)
    return first, child.returncode, (err if stream == "stdout" else out) or b""


@pytest.mark.parametrize("args", [["rules"], ["fields"]])
def test_a_reader_that_closes_the_pipe_early_ends_the_command_quietly_with_exit_0(args):
    first, code, stderr = read_then_close(cli(*args))
    assert first  # it was writing when the reader went away
    assert code == 0
    assert stderr == b""


def test_a_run_whose_log_reader_goes_away_still_finishes_its_work(tmp_path):
    config_path = make_site(tmp_path / "site", days=2)
    first, code, _stdout = read_then_close(cli("run", "--config", str(config_path)), stream="stderr")
    assert first
    assert code == 65  # the site's rejected file: the run's own outcome, not a pipe error
    con = duckdb.connect(str(load_config(config_path).store_path), read_only=True)
    try:
        assert con.execute("select outcome, files_loaded from runs").fetchall() == [("completed_with_rejections", 2)]
    finally:
        con.close()


# --------------------------------------------------------------------------------------
# check-profile: the checks of a run, in memory
# --------------------------------------------------------------------------------------


def export(tmp_path: Path, name: str, rows: list[str]) -> Path:
    path = tmp_path / name
    path.write_text(HEADER + "".join(rows), encoding="utf-8")
    return path


def in_kpa(row: str) -> str:
    """A row of the test site with its gases in kPa (1 kPa = 7.50062 mmHg, BIPM SI brochure:
    1 mmHg = 133.322 Pa), as an export from a European analyser writes them."""
    cells = row.rstrip("\n").split(",")
    cells[9] = f"{float(cells[9]) / 7.50062:.2f}"
    cells[10] = f"{float(cells[10]) / 7.50062:.2f}"
    return ",".join(cells) + "\n"


def fio2_in_percent(row: str) -> str:
    cells = row.rstrip("\n").split(",")
    cells[7] = f"{float(cells[7]) * 100:g}"
    return ",".join(cells) + "\n"


def test_check_profile_rejects_kpa_declared_as_mmhg_with_the_message_of_a_run(tmp_path):
    kpa = export(tmp_path, "kpa.csv", [in_kpa(r) for r in day_rows(1, 30)])
    check = run_cli("check-profile", str(PROFILE), str(kpa))
    assert check.returncode == 65, check.stdout + check.stderr
    line = next(line for line in check.stdout.splitlines() if "kpa.csv" in line)
    assert line.startswith("  kpa.csv: would be REJECTED (UNIT_MISMATCH): ")
    assert re.search(r'the values look like kPa: set \[units\] pa(c)?o2_mmhg = "kPa"$', line)
    # A run gives the same message, on its first night.
    config_path = make_site(tmp_path / "site", days=0, rejected_file=False)
    shutil.copy(kpa, tmp_path / "site" / "exports" / "kpa.csv")
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path)], env=env())
    assert outcome.exit_code == 65
    con = duckdb.connect(str(load_config(config_path).store_path), read_only=True)
    try:
        message = con.execute("select message from file_events where reason_code = 'UNIT_MISMATCH'").fetchall()
    finally:
        con.close()
    assert message == [(line.split("(UNIT_MISMATCH): ", 1)[1],)]


def test_check_profile_rejects_fio2_in_percent_declared_as_a_fraction(tmp_path):
    percent = export(tmp_path, "percent.csv", [fio2_in_percent(r) for r in day_rows(1, 30)])
    check = run_cli("check-profile", str(PROFILE), str(percent))
    assert check.returncode == 65
    assert "percent.csv: would be REJECTED (UNIT_MISMATCH)" in check.stdout
    assert 'set [units] fio2 = "percent"' in check.stdout


def test_check_profile_reports_a_clean_file_and_a_missing_one_and_writes_nothing(tmp_path):
    good = export(tmp_path, "good.csv", [*day_rows(1, 30), day_rows(1, 30)[0]])
    bad_row = "Q1,P9,W1,2026-03-01 12:00,2026-03-01 12:05,Z,RA,0.21,7.4,40,90,24\n"
    with_bad = export(tmp_path, "with_bad.csv", [*day_rows(2, 30), bad_row])
    before = sorted(p.name for p in tmp_path.rglob("*"))
    check = run_cli("check-profile", str(PROFILE), str(good), str(tmp_path / "gone.csv"), str(with_bad))
    assert check.returncode == 66
    assert check.stderr.strip() == f"error: no such export file: {tmp_path / 'gone.csv'}"
    assert "  good.csv: 31 rows in = 30 would load + 0 quarantined + 1 duplicates + 0 superseded in file" in (
        check.stdout
    )
    assert "  with_bad.csv: 31 rows in = 30 would load + 1 quarantined" in check.stdout
    assert "    quarantine reasons: UNKNOWN_CODE 1" in check.stdout
    assert "P9" not in check.stdout + check.stderr and "P0" not in check.stdout  # no identifier is printed
    assert sorted(p.name for p in tmp_path.rglob("*")) == before  # nothing written beside the exports
    clean = run_cli("check-profile", str(PROFILE), str(good))
    assert clean.returncode == 0


# --------------------------------------------------------------------------------------
# The pseudonym key
# --------------------------------------------------------------------------------------


def test_a_key_shorter_than_the_minimum_is_a_configuration_error_that_never_shows_it(tmp_path, monkeypatch):
    short = "k" * (MIN_KEY_CHARS - 1)
    monkeypatch.setenv(KEY_ENV, short)
    with pytest.raises(ConfigError, match=f"fewer than the {MIN_KEY_CHARS} required") as caught:
        load_key(None)
    assert short not in str(caught.value)
    monkeypatch.setenv(KEY_ENV, "k" * MIN_KEY_CHARS)
    assert load_key(None) == b"k" * MIN_KEY_CHARS
    monkeypatch.delenv(KEY_ENV)
    key_file = tmp_path / "pseudonym.key"
    key_file.write_text(short + "\n", encoding="utf-8")
    key_file.chmod(0o600)
    with pytest.raises(ConfigError, match=f"{MIN_KEY_CHARS - 1} characters"):
        load_key(key_file)
    config_path = make_site(tmp_path / "site", days=1, rejected_file=False)
    (tmp_path / "site" / "secrets" / "pseudonym.key").write_text(short, encoding="utf-8")
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path)], env=env())
    assert outcome.exit_code == 78 and short not in outcome.output


def test_the_key_format_is_documented_where_keys_are_mentioned():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert f"at least {MIN_KEY_CHARS} characters" in readme
    for command in ("run", "reload"):
        text = CliRunner().invoke(main, [command, "--help"]).output
        assert f"at least {MIN_KEY_CHARS} characters" in " ".join(text.split()), command


# --------------------------------------------------------------------------------------
# The README's test command is CI's
# --------------------------------------------------------------------------------------


def set_up_block() -> list[str]:
    """The lines of the README's set-up code block, without its language tag."""
    block = (ROOT / "README.md").read_text(encoding="utf-8").split("## Set up and run", 1)[1].split("```", 2)[1]
    return block.splitlines()[1:]


def readme_step(number: int) -> str:
    lines = set_up_block()
    for index, line in enumerate(lines):
        if line.startswith(f"# {number}. "):
            return lines[index + 1]
    raise AssertionError(f"no step {number}")


def test_the_readme_has_two_set_up_commands_and_ci_runs_the_second_one():
    commands = [line for line in set_up_block() if line.strip() and not line.startswith("#")]
    assert len(commands) == 2 and commands[1] == readme_step(2)
    assert readme_step(2).startswith("scripts/install-test-deps && ")
    assert "pytest" in readme_step(2)
    # .ci/run runs that very line, then the linter.
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8").splitlines()
    assert readme_step(2) in ci
    assert ci.index(readme_step(2)) < ci.index(".venv/bin/ruff check . || status=1")


def fake_bin(folder: Path, *names: str) -> Path:
    folder.mkdir()
    for name in names:
        tool = folder / name
        tool.write_text(f"#!/bin/sh\necho {name} \"$@\" >> {folder}/calls\n", encoding="utf-8")
        tool.chmod(0o755)
    return folder


def test_install_test_deps_does_nothing_when_chromium_is_there_and_says_so_without_apt(tmp_path):
    script = str(ROOT / "scripts" / "install-test-deps")
    present = fake_bin(tmp_path / "with", "chromium", "apt-get")
    done = subprocess.run([script], env={"PATH": str(present)}, capture_output=True, text=True)
    assert done.returncode == 0 and done.stderr == ""
    assert not (present / "calls").exists()  # apt-get was not called
    nothing = fake_bin(tmp_path / "without")
    refused = subprocess.run([script], env={"PATH": str(nothing)}, capture_output=True, text=True)
    assert refused.returncode == 1
    assert "chromium is not installed and there is no apt-get here" in refused.stderr


def test_the_run_summary_counts_corrections_per_kind_and_names_where_each_is_kept(tmp_path, capsys):
    # A fresh-user run found the corrections line saying "samples" for corrected prescriptions too.
    from pipeline.ingest.load import FileOutcome
    from pipeline.run import RunResult
    from pipeline.summary import print_run_summary

    result = RunResult(run_id="r1")
    result.files = [
        FileOutcome(path=tmp_path / "a.csv", profile="p", kind="samples", corrections=3),
        FileOutcome(path=tmp_path / "b.csv", profile="p", kind="samples", corrections=2),
        FileOutcome(path=tmp_path / "c.csv", profile="q", kind="prescriptions", corrections=4),
    ]
    config = load_config(make_site(tmp_path / "site"))
    print_run_summary(result, config)
    out = capsys.readouterr().out
    # and the closing lines say where the report is (log lines scroll away)
    assert f"outputs: {config.output_folder / 'audit_report.html'}" in out
    lines = [line.strip() for line in out.splitlines() if "corrections" in line]
    assert lines == [
        "corrections: 5 samples replaced an earlier version (kept in superseded_records)",
        "corrections: 4 prescriptions replaced an earlier version (kept in superseded_prescriptions)",
    ]


def test_detection_report_help_gives_its_own_exit_codes():
    # A fresh-user reading found no exit codes under detection-report --help.
    text = CliRunner().invoke(main, ["detection-report", "--help"]).output
    assert "1   a detection target missed" in text and "0   every detection target met" in text
    assert "every file loaded" not in text  # it loads nothing
