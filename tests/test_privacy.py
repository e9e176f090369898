"""Privacy: planted patient identifiers never leave the protected store, and everything the
store is made of is readable by its owner only.

Every patient identifier of the test site is a distinctive canary (``CANARY-7Q9Z-<n>``),
in rows that load, rows that are quarantined and files that are rejected. Real
``abg-audit`` processes run the whole pipeline; their stdout and stderr, every file they
write and every text column of every table in the store are scanned. The canary may
appear only in ``records.patient_id`` (and its history, ``superseded_records.patient_id``)
and ``quarantine.original_text``; with ``[store] keep_patient_id = false`` not in records.
"""

from __future__ import annotations

import io
import os
import stat
import zipfile
from pathlib import Path

import duckdb
import polars as pl
import pytest
from click.testing import CliRunner

import pipeline.run as run_module
from pipeline.cli import main
from pipeline.config import load_config
from pipeline.log import Log
from pipeline.pseudonym import load_key
from pipeline.run import run_pipeline
from tests.nightly_site import HEADER, add_day, day_rows, env, keep_umask, make_site, run_cli

__all__ = ["keep_umask"]  # an autouse fixture

CANARY = "CANARY-7Q9Z"
ALLOWED = {("records", "patient_id"), ("superseded_records", "patient_id"), ("quarantine", "original_text")}


def canary(number: int) -> str:
    return f"{CANARY}-{number}"


def plant_failing_files(root: Path) -> None:
    """Files that fail in other ways, each carrying canaries."""
    exports = root / "exports"
    rows = day_rows(7, 4, canary)
    # No header line: the first record is taken as the header and the file is rejected.
    (exports / "day07_no_header.csv").write_text("".join(rows), encoding="utf-8")
    # No header line, and the identifier in two columns: the "header" repeats a name.
    cells = rows[1].split(",")
    cells[2] = cells[1]
    (exports / "day07_no_header_twice.csv").write_text(",".join(cells) + "".join(rows[2:]), encoding="utf-8")
    # NUL bytes: not a text export.
    (exports / "day08_binary.csv").write_bytes((HEADER + "".join(rows)).encode() + b"\x00\x01")
    # Latin-1 bytes in a file declared UTF-8.
    latin = HEADER + rows[0].replace(CANARY, CANARY + "-\u00e9") + "".join(rows[1:])
    (exports / "day09_latin1.csv").write_bytes(latin.encode("latin-1"))
    # The identifier typed into measurement and time columns: quarantined rows.
    misplaced = rows[0].replace(",7.", f",{canary(55)}.").replace("2026-03-07 10:", f"{canary(56)} 10:", 1)
    (exports / "day10_misplaced.csv").write_text(HEADER + misplaced + "".join(rows[1:]), encoding="utf-8")


def texts_of(path: Path) -> list[str]:
    """What a reader of the file can see: raw text, or the cells of Parquet and workbooks."""
    if path.suffix == ".parquet":
        frame = pl.read_parquet(path)
        return [frame.write_csv(), " ".join(frame.columns)]
    if path.suffix == ".xlsx":
        with zipfile.ZipFile(path) as book:
            return [book.read(name).decode("utf-8", errors="replace") for name in book.namelist()]
    return [path.read_bytes().decode("utf-8", errors="replace")]


def leaks_in_files(root: Path, store: Path) -> list[str]:
    found = []
    for path in sorted(root.rglob("*")):
        if not path.is_file() or path.parent.name in ("exports", "secrets") or path.name.startswith(store.name):
            continue  # inputs carry canaries by design; the store is the protected place
        if any(CANARY in text for text in texts_of(path)):
            found.append(str(path.relative_to(root)))
    return found


def leaks_in_store(store: Path) -> set[tuple[str, str]]:
    """(table, column) pairs of text columns holding a canary."""
    con = duckdb.connect(str(store), read_only=True)
    try:
        columns = con.execute(
            "select table_name, column_name from duckdb_columns() "
            "where schema_name = 'main' and not internal and data_type in ('VARCHAR', 'JSON')"
        ).fetchall()
        found = set()
        for table, column in columns:
            hits = con.execute(f'select count(*) from "{table}" where "{column}" like ?', [f"%{CANARY}%"])
            if hits.fetchall()[0][0]:
                found.add((table, column))
        return found
    finally:
        con.close()


@pytest.mark.slow
def test_planted_identifiers_stay_in_the_protected_store(tmp_path):
    root = tmp_path / "canary"
    config_path = make_site(root, patient=canary)
    plant_failing_files(root)
    store = load_config(config_path).store_path
    first = run_cli("run", "--config", str(config_path))
    assert first.returncode == 65, first.stderr
    add_day(root, 4, patient=canary)
    second = run_cli("run", "--config", str(config_path), "--log-format", "json")
    assert second.returncode == 65, second.stderr
    listing = run_cli("runs", "--config", str(config_path), "--limit", "5")
    exports = sorted(str(p) for p in (root / "exports").iterdir())
    check = run_cli("check-profile", str(root / "profile.toml"), *exports)
    said = [text for process in (first, second, listing, check) for text in (process.stdout, process.stderr)]

    # The site went through every path: loaded, quarantined, rejected in three ways.
    con = duckdb.connect(str(store), read_only=True)
    try:
        one = lambda sql: con.execute(sql).fetchall()  # noqa: E731
        reasons = {r for (r,) in one("select distinct reason_code from file_events where reason_code is not null")}
        quarantined = one(f"select count(*) from quarantine where original_text like '%{CANARY}%'")[0][0]
        held = one(f"select count(*) from records where patient_id like '{CANARY}-%'")[0][0]
    finally:
        con.close()
    assert {"MISSING_COLUMN", "DUPLICATE_COLUMN", "BINARY_FILE", "ENCODING_INVALID"} <= reasons
    assert quarantined == 13 and held == 4 * 30 + 3  # 4 days x 3 failing rows + 1 misplaced; 3 of day 10 load
    assert sum("rejected" in text for text in said) >= 3

    # No canary in anything a person or another program sees.
    assert [text for text in said if CANARY in text] == []
    assert (root / "output" / "audit_report.html").exists()
    assert leaks_in_files(root, store) == []
    found = leaks_in_store(store)
    assert found - ALLOWED == set()
    assert ("records", "patient_id") in found and ("quarantine", "original_text") in found


def test_site_that_keeps_no_identifier_stores_none_in_records(tmp_path):
    config_path = make_site(tmp_path / "site", patient=canary, keep_patient_id=False)
    stream = io.StringIO()
    run_pipeline(load_config(config_path), Log("json", stream=stream))
    store = load_config(config_path).store_path
    assert CANARY not in stream.getvalue()
    assert leaks_in_store(store) == {("quarantine", "original_text")}
    con = duckdb.connect(str(store), read_only=True)
    try:
        keys = con.execute("select count(*), count(patient_id), count(distinct patient_key) from records").fetchall()
    finally:
        con.close()
    records, with_identifier, patients = keys[0]
    assert records == 90 and with_identifier == 0 and patients > 1  # pseudonyms still link samples


# --------------------------------------------------------------------------------------
# File permissions and the pseudonym key
# --------------------------------------------------------------------------------------


def test_store_wal_lock_and_outputs_folder_are_owner_only(tmp_path, monkeypatch):
    config_path = make_site(tmp_path / "site", rejected_file=False)
    config = load_config(config_path)
    seen: dict[str, int] = {}

    def look(stage: str) -> None:  # just before the final checkpoint the write-ahead log exists
        if stage == "checkpoint":
            for path in [config.store_path.parent, *config.store_path.parent.rglob("*")]:
                seen[path.name] = stat.S_IMODE(path.stat().st_mode)

    monkeypatch.setattr(run_module, "pause_point", look)
    old = os.umask(0o022)  # a permissive caller: the run must not depend on the caller's umask
    try:
        run_pipeline(config, Log(stream=io.StringIO()))
        after_umask = os.umask(0o022)
    finally:
        os.umask(old)
    assert after_umask == 0o022  # the run gives the caller's umask back
    store = config.store_path.name
    assert {store, store + ".wal", store + ".lock"} <= set(seen)
    assert seen[config.store_path.parent.name] == 0o700
    assert {name: mode for name, mode in seen.items() if mode & 0o077} == {}
    restricted = config.output_folder / "restricted"
    for path in [restricted, *restricted.iterdir()]:
        assert stat.S_IMODE(path.stat().st_mode) & 0o077 == 0, path.name
    # Published aggregate outputs: the analysts' group may enter and read, nobody else.
    for folder in (config.output_folder, config.output_folder / "tables"):
        assert stat.S_IMODE(folder.stat().st_mode) == 0o750, folder.name
    assert stat.S_IMODE((config.output_folder / "audit_report.html").stat().st_mode) == 0o640


def test_created_key_file_is_owner_only_in_an_owner_only_folder(tmp_path):
    key_file = tmp_path / "keys" / "pseudonym.key"
    key = load_key(key_file, create=True)
    assert len(key) >= 32 and load_key(key_file) == key
    assert stat.S_IMODE(key_file.stat().st_mode) == 0o600
    assert stat.S_IMODE(key_file.parent.stat().st_mode) & 0o077 == 0


@pytest.mark.parametrize("problem", ["missing", "readable_by_others", "not_configured"])
def test_key_problems_are_configuration_errors_that_never_show_the_key(tmp_path, monkeypatch, problem):
    monkeypatch.delenv("ABG_AUDIT_PSEUDONYM_KEY", raising=False)
    config_path = make_site(tmp_path / "site", rejected_file=False)
    key_file = tmp_path / "site" / "secrets" / "pseudonym.key"
    secret = key_file.read_text(encoding="utf-8")
    if problem == "missing":
        key_file.unlink()
    elif problem == "readable_by_others":
        key_file.chmod(0o644)
    else:
        text = config_path.read_text(encoding="utf-8").replace('key_file = "secrets/pseudonym.key"\n', "")
        config_path.write_text(text, encoding="utf-8")
    outcome = CliRunner().invoke(main, ["run", "--config", str(config_path)], env=env())
    assert outcome.exit_code == 78
    line = outcome.output.strip()
    assert line.startswith("error: ") and "pseudonym key" in line and len(line.splitlines()) == 1
    assert secret not in outcome.output
    assert not load_config(config_path).store_path.exists()  # refused before the store was touched


# --------------------------------------------------------------------------------------
# Encounter and operator identifiers, and the oxygen prescriptions feed
# --------------------------------------------------------------------------------------

STAFF_AND_PRESCRIPTION_COLUMNS = {
    ("records", "patient_id"),
    ("records", "encounter_id"),
    ("records", "operator_id"),
    ("superseded_records", "patient_id"),
    ("superseded_records", "encounter_id"),
    ("superseded_records", "operator_id"),
    ("prescriptions", "patient_id"),
    ("prescriptions", "encounter_id"),
    ("superseded_prescriptions", "patient_id"),
    ("superseded_prescriptions", "encounter_id"),
    ("quarantine", "original_text"),
}
PRESCRIPTION_PROFILE = """\
[profile]
name = "canary_prescriptions"
kind = "prescriptions"
datetime_format = "%Y-%m-%d %H:%M"
timezone = "Europe/London"

[columns]
prescription_id = "order"
patient_id = "mrn"
encounter_id = "encounter"
unit = "ward"
start_at = "start"
end_at = "end"
target_spo2_low_pct = "low"
target_spo2_high_pct = "high"
o2_device = "device"

[codes.o2_device]
"NC" = "nasal_cannula"
"""


def make_staff_site(root: Path, *, keep_patient_id: bool = True) -> Path:
    """The nightly test site whose samples also carry encounter and operator canaries, plus a
    prescriptions feed with canary patients and encounters: rows that load, rows that are
    quarantined (a bad date, an invalid target range), a correction, and a rejected file."""
    config = make_site(root, days=1, patient=canary, keep_patient_id=keep_patient_id, rejected_file=False)
    profile = root / "profile.toml"
    text = profile.read_text(encoding="utf-8").replace(
        'hco3_mmol_l = "hco3"\n', 'hco3_mmol_l = "hco3"\nencounter_id = "enc"\noperator_id = "op"\n'
    )
    profile.write_text(text, encoding="utf-8")
    # The day's file gains the two columns (the site's profile now maps them).
    day = root / "exports" / "day01.csv"
    lines = day.read_text(encoding="utf-8").splitlines()
    rows = [lines[0] + ",enc,op"] + [
        f"{line},{CANARY}-EN{n % 4},{CANARY}-OP{n % 3}" for n, line in enumerate(lines[1:], start=1)
    ]
    day.write_text("\n".join(rows) + "\n", encoding="utf-8")
    (root / "rx_profile.toml").write_text(PRESCRIPTION_PROFILE, encoding="utf-8")
    rx = root / "exports"  # beside the samples, told apart by the inputs' patterns
    header = "order,mrn,encounter,ward,start,end,low,high,device\n"
    (rx / "rx1.csv").write_text(
        header
        + f"RX1,{canary(101)},{CANARY}-EN1,W1,2026-03-01 08:00,,94,98,NC\n"
        + f"RX2,{canary(102)},{CANARY}-EN2,W1,2026-03-01 0x:00,,94,98,NC\n"
        + f"RX3,{canary(103)},{CANARY}-EN3,W2,2026-03-01 08:00,,98,94,NC\n",
        encoding="utf-8",
    )
    (rx / "rx2.csv").write_text(  # RX1 now ends: a correction
        header + f"RX1,{canary(101)},{CANARY}-EN1,W1,2026-03-01 08:00,2026-03-02 08:00,94,98,NC\n", encoding="utf-8"
    )
    (rx / "rx3_rejected.csv").write_text(  # no start column: the whole file is rejected
        header.replace(",start,", ",begins,") + f"RX9,{canary(109)},{CANARY}-EN9,W1,2026-03-01 08:00,,94,98,NC\n",
        encoding="utf-8",
    )
    config.write_text(
        config.read_text(encoding="utf-8").replace('pattern = "*.csv"', 'pattern = "day*.csv"')
        + '\n[[inputs]]\npath = "exports"\nprofile = "rx_profile.toml"\npattern = "rx*.csv"\nkind = "prescriptions"\n',
        encoding="utf-8",
    )
    return config


def test_encounter_operator_and_prescription_identifiers_stay_in_the_protected_store(tmp_path):
    root = tmp_path / "staff"
    config_path = make_staff_site(root)
    config = load_config(config_path)
    stream = io.StringIO()
    result = run_pipeline(config, Log("json", stream=stream))
    outcomes = sorted((f.kind, f.path.name, f.outcome) for f in result.files)
    assert outcomes == [
        ("prescriptions", "rx1.csv", "loaded"),
        ("prescriptions", "rx2.csv", "loaded"),
        ("prescriptions", "rx3_rejected.csv", "rejected"),
        ("samples", "day01.csv", "loaded"),
    ]
    con = duckdb.connect(str(config.store_path), read_only=True)
    try:
        held = con.execute(
            "select count(*), count(encounter_id), count(operator_id), count(distinct operator_key) from records"
        ).fetchall()
        rx = con.execute("select count(*) from prescriptions").fetchall()
        rx_old = con.execute("select count(*) from superseded_prescriptions").fetchall()
        rx_quarantined = con.execute("select count(*) from quarantine where record_kind = 'prescription'").fetchall()
    finally:
        con.close()
    # Hand-counted: 30 sample rows load (3 fail), each with an encounter and one of 3 operators;
    # RX1 loads and is corrected by rx2.csv, RX2 (bad date) and RX3 (98-94) are quarantined.
    assert held == [(30, 30, 30, 3)]
    assert (rx, rx_old, rx_quarantined) == ([(1,)], [(1,)], [(2,)])
    assert CANARY not in stream.getvalue()
    assert leaks_in_files(root, config.store_path) == []
    found = leaks_in_store(config.store_path)
    assert found - STAFF_AND_PRESCRIPTION_COLUMNS == set()
    assert {("records", "operator_id"), ("prescriptions", "encounter_id"), ("quarantine", "original_text")} <= found


def test_site_that_keeps_no_identifier_stores_no_encounter_operator_or_prescription_identifier(tmp_path):
    root = tmp_path / "staff"
    config = load_config(make_staff_site(root, keep_patient_id=False))
    stream = io.StringIO()
    run_pipeline(config, Log("json", stream=stream))
    assert CANARY not in stream.getvalue()
    assert leaks_in_files(root, config.store_path) == []
    assert leaks_in_store(config.store_path) == {("quarantine", "original_text")}


# Identifiers with the edges a bulk hash could get wrong: white space Python's str.strip() removes
# (including U+001C..U+001F, which are not Unicode White_Space), non-ASCII text, inner spaces, one
# character, an identifier that is only white space.
_IDENTIFIER_EDGES = [
    "MRN0001", " MRN0001 ", "\tMRN0001\n", "\x1cMRN0001\x1f", "\u3000MRN\u00a00001\u2029", "Zoë-Ångström",
    "患者-42", "a", "x" * 300, " \x1d ", "MRN 0001", "\u200bMRN0001",
]


@pytest.mark.parametrize(
    "key",
    [b"0123456789abcdef0123456789abcdef", b"k" * 64, ("long-key-" * 20).encode()],
    ids=["32-byte key", "block-sized key", "key longer than a block"],
)
def test_bulk_pseudonyms_in_sql_equal_python_hmac(key):
    """The SQL macro that pseudonymises a file's identifiers in bulk gives, for every domain,
    exactly the HMAC-SHA256 that Python's standard library gives (oracle: the hmac module,
    RFC 2104), including keys longer than SHA-256's block, which HMAC hashes first."""
    import hashlib
    import hmac

    from pipeline.pseudonym import PSEUDONYM_CHARS, domain_key, hmac_pads
    from pipeline.schema import PSEUDONYMISED
    from pipeline.sql_files import run_sql

    con = duckdb.connect()
    run_sql(con, "ingest/14_keyed_pseudonym.sql")
    for _column, (_output, domain) in PSEUDONYMISED.items():
        inner, outer = hmac_pads(key, domain)
        got = [
            con.execute("select keyed_pseudonym(?, ?, ?, ?)", [ident, inner, outer, PSEUDONYM_CHARS]).fetchall()[0][0]
            for ident in _IDENTIFIER_EDGES
        ]
        keyed = domain_key(key, domain)
        expected = [
            hmac.new(keyed, ident.strip().encode("utf-8"), hashlib.sha256).hexdigest()[:PSEUDONYM_CHARS]
            for ident in _IDENTIFIER_EDGES
        ]
        assert got == expected, domain
