"""The oxygen prescriptions feed is loaded with the guarantees of samples.

Every row of a hand-written prescriptions export ends in exactly one place (loaded,
quarantined with its reason, duplicate, superseded in the file); a later file corrects a
prescription (version + 1, the old version kept); the same bytes are never loaded twice;
whole-file faults reject the file; one transaction per file. Expected counts and outcomes
are hand-counted from the rows written below.
"""

from __future__ import annotations

import hashlib
import hmac
import io
import json
from pathlib import Path

import duckdb
import pint
import pytest

from pipeline.config import load_config
from pipeline.errors import ConfigError
from pipeline.ingest import load as load_module
from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.log import Log
from pipeline.profile import Profile, load_profile
from pipeline.run import run_pipeline
from pipeline.store import open_store
from tests.nightly_site import keep_umask, make_site

__all__ = ["keep_umask"]  # an autouse fixture

KEY = b"test-key-0123456789abcdef"
ureg = pint.UnitRegistry()

PROFILE = """\
# Test profile: an invented electronic prescribing export, London time.
[profile]
name = "test_prescriptions"
kind = "prescriptions"
delimiter = ","
datetime_format = "%Y-%m-%d %H:%M"
timezone = "Europe/London"

[columns]
prescription_id = "Order ID"
patient_id = "MRN"
encounter_id = "Encounter"
unit = "Ward"
start_at = "Start"
end_at = "End"
target_spo2_low_pct = "Target Low"
target_spo2_high_pct = "Target High"
o2_device = "Device"
o2_flow_l_min = "Flow"
fio2 = "FiO2"
prescriber_role = "Role"

[units]
fio2 = "{fio2_unit}"

[codes.o2_device]
"NC" = "nasal_cannula"
"VM" = "venturi_mask"
"RA" = "room_air"
"""
HEADER = "Order ID,MRN,Encounter,Ward,Start,End,Target Low,Target High,Device,Flow,FiO2,Role\n"

# Day 1: one row per case. Outcomes, hand-counted:
#   row 1  RX1  good, closed                               -> counted as duplicate (row 8 is kept)
#   row 2  RX2  good, open-ended (empty end), summer time   -> loaded
#   row 3  RX3  start "2026-03-02 x9:00"                    -> quarantined DATE_UNPARSEABLE
#   row 4  RX4  end 11:00 before start 12:00                -> quarantined END_BEFORE_START
#   row 5  RX5  target 98-94 (low >= high)                  -> quarantined TARGET_RANGE_INVALID
#   row 6  RX6  target 40-60 (low below 50 %)               -> quarantined TARGET_RANGE_INVALID
#   row 7  RX7  device "XYZ" not in [codes.o2_device]       -> quarantined UNKNOWN_CODE
#   row 8  RX1  identical to row 1                          -> loaded (the file's last row wins)
#   row 9  RX8  flow 1                                      -> superseded in file by row 10
#   row 10 RX8  flow 3                                      -> loaded
#   row 11 RX9  start empty                                 -> quarantined MISSING_REQUIRED
# rows in 11 = loaded 3 (RX1, RX2, RX8) + quarantined 6 + duplicate 1 + superseded 1.
DAY1 = HEADER + (
    "RX1,P1,E1,Heron Ward,2026-03-02 08:00,2026-03-02 20:00,94,98,NC,2,,doctor\n"
    "RX2,P2,E2,Heron Ward,2026-07-02 09:00,,88,92,VM,,0.28,nurse_practitioner\n"
    "RX3,P3,,Kestrel Ward,2026-03-02 x9:00,,94,98,NC,2,,doctor\n"
    "RX4,P4,E4,Kestrel Ward,2026-03-02 12:00,2026-03-02 11:00,94,98,NC,2,,doctor\n"
    "RX5,P5,E5,Kestrel Ward,2026-03-02 12:00,,98,94,NC,2,,doctor\n"
    "RX6,P6,E6,Kestrel Ward,2026-03-02 12:00,,40,60,NC,2,,doctor\n"
    "RX7,P7,E7,Kestrel Ward,2026-03-02 12:00,,94,98,XYZ,2,,doctor\n"
    "RX1,P1,E1,Heron Ward,2026-03-02 08:00,2026-03-02 20:00,94,98,NC,2,,doctor\n"
    "RX8,P8,E8,Osprey Ward,2026-03-02 13:00,,92,96,NC,1,,doctor\n"
    "RX8,P8,E8,Osprey Ward,2026-03-02 13:00,,92,96,NC,3,,physiotherapist\n"
    "RX9,P9,,Osprey Ward,,,94,98,NC,2,,doctor\n"
)
# Day 2, hand-counted: RX2 now ends (a correction, version 2); RX1 unchanged (a duplicate
# of the store); RX10 new. rows in 3 = loaded 2 (1 correction) + duplicate 1.
DAY2 = HEADER + (
    "RX2,P2,E2,Heron Ward,2026-07-02 09:00,2026-07-03 10:00,88,92,VM,,0.28,nurse_practitioner\n"
    "RX1,P1,E1,Heron Ward,2026-03-02 08:00,2026-03-02 20:00,94,98,NC,2,,doctor\n"
    "RX10,P1,E1,Heron Ward,2026-03-02 20:00,,92,96,NC,1,,doctor\n"
)


@pytest.fixture
def store(tmp_path: Path) -> duckdb.DuckDBPyConnection:
    con = open_store(tmp_path / "store.duckdb")
    yield con
    con.close()


def write_profile(folder: Path, fio2_unit: str = "fraction") -> Path:
    path = folder / "prescriptions.toml"
    path.write_text(PROFILE.format(fio2_unit=fio2_unit), encoding="utf-8")
    return path


@pytest.fixture
def profile(tmp_path: Path) -> Profile:
    return load_profile(write_profile(tmp_path))


def load(con: duckdb.DuckDBPyConnection, folder: Path, content: str, profile: Profile, name: str) -> FileOutcome:
    path = folder / name
    path.write_text(content, encoding="utf-8")
    outcome = ingest_file(con, path, profile, "r1", KEY)
    assert outcome.balanced, outcome
    if outcome.outcome == "loaded":
        held = con.execute("select count(*) from prescriptions where file_sha256 = ?", [outcome.sha256]).fetchall()
        quarantined = con.execute(
            "select count(*) from quarantine where file_sha256 = ?", [outcome.sha256]
        ).fetchall()
        assert held[0][0] == outcome.rows_loaded and quarantined[0][0] == outcome.rows_quarantined
    return outcome


def one(con: duckdb.DuckDBPyConnection, sql: str, params: list | None = None) -> list[tuple]:
    return con.execute(sql, params or []).fetchall()


def test_every_row_of_a_prescriptions_file_ends_in_one_place(store, tmp_path, profile):
    f = load(store, tmp_path, DAY1, profile, "rx_day1.csv")
    assert (f.outcome, f.kind) == ("loaded", "prescriptions")
    counts = (f.rows_in, f.rows_loaded, f.rows_quarantined, f.rows_duplicate, f.rows_superseded_in_file)
    assert counts == (11, 3, 6, 1, 1)  # hand-counted, see DAY1

    quarantined = one(
        store,
        "select source_row, record_kind, record_id, sample_id, reason_code, failed_columns from quarantine "
        "order by source_row",
    )
    assert quarantined == [
        (3, "prescription", "RX3", None, "DATE_UNPARSEABLE", "start_at:DATE_UNPARSEABLE"),
        (4, "prescription", "RX4", None, "END_BEFORE_START", "end_at:END_BEFORE_START"),
        (
            5,
            "prescription",
            "RX5",
            None,
            "TARGET_RANGE_INVALID",
            "target_spo2_low_pct:TARGET_RANGE_INVALID; target_spo2_high_pct:TARGET_RANGE_INVALID",
        ),
        (6, "prescription", "RX6", None, "TARGET_RANGE_INVALID", "target_spo2_low_pct:TARGET_RANGE_INVALID"),
        (7, "prescription", "RX7", None, "UNKNOWN_CODE", "o2_device:UNKNOWN_CODE"),
        (11, "prescription", "RX9", None, "MISSING_REQUIRED", "start_at:MISSING_REQUIRED"),
    ]
    # The original cells are kept, keyed by the source header.
    original = json.loads(one(store, "select original_text from quarantine where source_row = 3")[0][0])
    assert original["Start"] == "2026-03-02 x9:00" and original["Order ID"] == "RX3"

    held = one(
        store,
        "select prescription_id, source_row, version, start_at, end_at, target_spo2_low_pct, target_spo2_high_pct, "
        "o2_device, o2_flow_l_min, fio2, prescriber_role from prescriptions order by prescription_id",
    )
    assert [(r[0], r[1], r[2]) for r in held] == [("RX1", 8, 1), ("RX2", 2, 1), ("RX8", 10, 1)]
    rx1, rx2, rx8 = held
    # 08:00 in London on 2 March is GMT (UTC+0); 09:00 on 2 July is BST (UTC+1) (IANA tz database).
    assert (str(rx1[3]), str(rx1[4])) == ("2026-03-02 08:00:00", "2026-03-02 20:00:00")
    assert str(rx2[3]) == "2026-07-02 08:00:00" and rx2[4] is None  # open-ended: end_at NULL
    assert rx1[5:10] == (94.0, 98.0, "nasal_cannula", 2.0, None)
    assert rx2[7] == "venturi_mask" and rx2[9] == pytest.approx(0.28)
    assert (rx8[8], rx8[10]) == (3.0, "physiotherapist")  # the file's last row of RX8

    superseded = one(
        store,
        "select prescription_id, source_row, o2_flow_l_min, superseded_by_row, superseded_in_run "
        "from superseded_prescriptions",
    )
    assert superseded == [("RX8", 9, 1.0, 10, "r1")]
    duplicates = one(store, "select record_kind, record_id, sample_id, source_row, duplicate_of from merged_duplicates")
    assert duplicates == [("prescription", "RX1", None, 1, "row in the same file")]
    ledger = one(store, "select kind, rows_in, rows_loaded, rows_quarantined from ingested_files")
    assert ledger == [("prescriptions", 11, 3, 6)]
    assert one(store, "select count(*) from records") == [(0,)]  # nothing leaks into the sample tables


def test_a_later_file_corrects_a_prescription_and_keeps_the_old_version(store, tmp_path, profile):
    load(store, tmp_path, DAY1, profile, "rx_day1.csv")
    g = load(store, tmp_path, DAY2, profile, "rx_day2.csv")
    counts = (g.rows_in, g.rows_loaded, g.corrections, g.rows_duplicate, g.rows_quarantined)
    assert counts == (3, 2, 1, 1, 0)  # hand-counted, see DAY2
    rx2 = one(store, "select version, end_at, source_file from prescriptions where prescription_id = 'RX2'")
    assert rx2[0][0] == 2 and str(rx2[0][1]) == "2026-07-03 09:00:00"  # 10:00 BST = 09:00 UTC
    assert rx2[0][2].endswith("rx_day2.csv")
    old = one(
        store,
        "select version, end_at, source_file, superseded_by_row from superseded_prescriptions "
        "where prescription_id = 'RX2'",
    )
    assert len(old) == 1 and old[0][0] == 1 and old[0][1] is None and old[0][2].endswith("rx_day1.csv")
    assert old[0][3] == 1
    assert one(store, "select version from prescriptions where prescription_id = 'RX1'") == [(1,)]
    assert one(store, "select duplicate_of from merged_duplicates where source_row = 2 and record_id = 'RX1'") == [
        ("record already held",)
    ]
    assert one(store, "select count(*) from prescriptions") == [(4,)]  # RX1, RX2, RX8, RX10


def test_the_same_file_delivered_twice_is_loaded_once(store, tmp_path, profile):
    first = load(store, tmp_path, DAY1, profile, "rx_day1.csv")
    again = load(store, tmp_path, DAY1, profile, "rx_day1_resent.csv")  # same bytes, another name
    same = ingest_file(store, tmp_path / "rx_day1.csv", profile, "r2", KEY)
    assert first.outcome == "loaded"
    assert again.outcome == same.outcome == "already_loaded"
    assert (again.rows_in, again.rows_loaded) == (0, 0)
    assert one(store, "select count(*) from prescriptions") == [(3,)]
    assert one(store, "select count(*) from quarantine") == [(6,)]
    assert one(store, "select count(*) from ingested_files") == [(1,)]


def test_patient_and_encounter_pseudonyms_link_to_samples_and_do_not_collide(store, tmp_path, profile):
    load(store, tmp_path, DAY1, profile, "rx_day1.csv")
    patient_key, encounter_key = one(
        store, "select patient_key, encounter_key from prescriptions where prescription_id = 'RX1'"
    )[0]
    # The patient pseudonym is the plain keyed hash (RFC 2104 HMAC-SHA256, via hashlib), the
    # same as on the samples; the encounter's is keyed by a key derived for its domain.
    assert patient_key == hmac.new(KEY, b"P1", hashlib.sha256).hexdigest()[:32]
    encounter_hmac_key = hmac.new(KEY, b"abg-audit pseudonym domain encounter", hashlib.sha256).digest()
    assert encounter_key == hmac.new(encounter_hmac_key, b"E1", hashlib.sha256).hexdigest()[:32]
    assert encounter_key != hmac.new(KEY, b"E1", hashlib.sha256).hexdigest()[:32]  # a patient called "E1"


def test_identifiers_are_not_kept_when_the_site_keeps_none(store, tmp_path, profile):
    path = tmp_path / "rx_day1.csv"
    path.write_text(DAY1, encoding="utf-8")
    f = ingest_file(store, path, profile, "r1", KEY, keep_patient_id=False)
    assert f.rows_loaded == 3
    ids = one(store, "select count(patient_id), count(encounter_id), count(patient_key), count(encounter_key) "
                     "from prescriptions")
    assert ids == [(0, 0, 3, 3)]
    assert one(store, "select count(*) from superseded_prescriptions where patient_id is not null") == [(0,)]


def test_missing_required_column_rejects_the_file(store, tmp_path, profile):
    content = DAY1.replace("Start,End", "Begins,End", 1)
    f = load(store, tmp_path, content, profile, "rx_no_start.csv")
    assert (f.outcome, f.reason_code) == ("rejected", "MISSING_COLUMN")
    assert "'Start' (start_at)" in (f.message or "")
    assert one(store, "select count(*) from prescriptions") == [(0,)]
    assert one(store, "select count(*) from ingested_files") == [(0,)]  # fixed, it loads next run


def test_dates_in_another_format_reject_the_file(store, tmp_path, profile):
    rows = "".join(f"RX{n},P{n},,W1,02/03/2026 08:0{n},,94,98,NC,2,,doctor\n" for n in range(1, 5))
    f = load(store, tmp_path, HEADER + rows, profile, "rx_us_dates.csv")
    assert (f.outcome, f.reason_code) == ("rejected", "DATE_FORMAT_MISMATCH")


def test_fio2_in_percent_declared_as_fraction_rejects_the_file_with_a_hint(store, tmp_path, profile):
    # Five rows, the least the file-level unit check judges (pipeline/ingest/load.py).
    rows = "".join(f"RX{n},P{n},,W1,2026-03-02 08:0{n},,88,92,VM,,28,doctor\n" for n in range(1, 6))
    f = load(store, tmp_path, HEADER + rows, profile, "rx_percent.csv")
    assert (f.outcome, f.reason_code) == ("rejected", "UNIT_MISMATCH")
    assert 'fio2 = "percent"' in (f.message or "")
    # Declared as percent, the same file loads: 28 % is a fraction of 0.28 (pint).
    (tmp_path / "fixed").mkdir()
    fixed = load_profile(write_profile(tmp_path / "fixed", fio2_unit="percent"))
    g = load(store, tmp_path, HEADER + rows + "\n", fixed, "rx_percent_fixed.csv")
    assert g.rows_loaded == 5
    expected = ureg.Quantity(28, "percent").to("dimensionless").magnitude
    assert one(store, "select min(fio2), max(fio2) from prescriptions")[0] == pytest.approx((expected, expected))


def test_a_failure_inside_the_transaction_leaves_none_of_the_file(store, tmp_path, profile, monkeypatch):
    def crash(stage: str) -> None:
        if stage == "load":
            raise RuntimeError("simulated crash inside the file's transaction")

    monkeypatch.setattr(load_module, "pause_point", crash)
    path = tmp_path / "rx_day1.csv"
    path.write_text(DAY1, encoding="utf-8")
    with pytest.raises(RuntimeError):
        ingest_file(store, path, profile, "r1", KEY)
    for table in ("prescriptions", "superseded_prescriptions", "quarantine", "merged_duplicates", "ingested_files"):
        assert one(store, f"select count(*) from {table}") == [(0,)], table
    monkeypatch.undo()
    assert ingest_file(store, path, profile, "r2", KEY).rows_loaded == 3  # loads on the next try


# --------------------------------------------------------------------------------------
# Configuration: the input kind and the profile kind agree
# --------------------------------------------------------------------------------------


def site_with_prescriptions(
    root: Path, *, kind_line: str = 'kind = "prescriptions"', profile: str | None = None
) -> Path:
    config = make_site(root, days=1, rows_per_day=12, rejected_file=False)
    write_profile(root)
    (root / "rx").mkdir(exist_ok=True)
    (root / "rx" / "rx_day1.csv").write_text(DAY1, encoding="utf-8")
    text = config.read_text(encoding="utf-8") + (
        f'\n[[inputs]]\npath = "rx"\nprofile = "{profile or "prescriptions.toml"}"\npattern = "*.csv"\n{kind_line}\n'
    )
    config.write_text(text, encoding="utf-8")
    return config


def test_input_kind_is_read_and_defaults_to_samples(tmp_path):
    config = load_config(site_with_prescriptions(tmp_path / "site"))
    kinds = [(i.kind, i.profile.kind) for i in config.inputs]
    assert kinds == [("samples", "samples"), ("prescriptions", "prescriptions")]


@pytest.mark.parametrize(
    ("kind_line", "profile", "message"),
    [
        ("", None, "is kind = 'samples' but its profile prescriptions.toml maps prescriptions"),
        (
            'kind = "prescriptions"',
            "profile.toml",
            "is kind = 'prescriptions' but its profile profile.toml maps samples",
        ),
        ('kind = "orders"', None, "kind = 'orders'; expected one of samples, prescriptions"),
    ],
)
def test_input_and_profile_kinds_must_agree(tmp_path, kind_line, profile, message):
    config = site_with_prescriptions(tmp_path / "site", kind_line=kind_line, profile=profile)
    with pytest.raises(ConfigError, match="entry 2") as err:
        load_config(config)
    assert message in str(err.value)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (('start_at = "Start"', 'collected_at = "Start"'), "unknown canonical fields of prescriptions records"),
        (('prescription_id = "Order ID"\n', ""), "must map the required fields: prescription_id"),
        (('[codes.o2_device]', '[codes.sample_type]\n"A" = "arterial"\n[codes.o2_device]'), "not a code list"),
        (('kind = "prescriptions"', 'kind = "orders"'), "kind = 'orders'"),
        (('"VM" = "venturi_mask"', '"VM" = "venturi"'), "unknown devices ['venturi']"),
    ],
)
def test_prescription_profile_mistakes_are_configuration_errors(tmp_path, change, message):
    path = write_profile(tmp_path)
    path.write_text(path.read_text(encoding="utf-8").replace(*change), encoding="utf-8")
    with pytest.raises(ConfigError) as err:
        load_profile(path)
    assert message in str(err.value)


def test_a_run_counts_prescription_files_and_says_so(tmp_path):
    config = load_config(site_with_prescriptions(tmp_path / "site"))
    stream = io.StringIO()
    result = run_pipeline(config, Log("json", stream=stream))
    kinds = sorted((f.kind, f.outcome) for f in result.files)
    assert kinds == [("prescriptions", "loaded"), ("samples", "loaded")]
    # Sample file: 12 clean rows + 3 failing (tests/nightly_site.py); prescriptions: DAY1.
    assert (result.total("rows_in"), result.total("rows_quarantined")) == (15 + 11, 3 + 6)
    lines = [json.loads(line) for line in stream.getvalue().splitlines()]
    messages = [line["message"] for line in lines]
    assert any("prescriptions input" in m for m in messages)
    assert any("11 prescriptions rows in = 3 loaded + 6 quarantined" in m for m in messages)
    con = duckdb.connect(str(config.store_path), read_only=True)
    try:
        run = one(con, "select files_seen, files_loaded, rows_in from runs where run_id = ?", [result.run_id])
        events = one(con, "select count(*) from file_events where run_id = ?", [result.run_id])
        ledger = one(con, "select kind, count(*) from ingested_files group by kind order by kind")
    finally:
        con.close()
    assert run == [(2, 2, 26)] and events == [(2,)]
    assert ledger == [("prescriptions", 1), ("samples", 1)]
