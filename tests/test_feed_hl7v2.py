"""HL7 v2 ORU^R01 result files through the loader: every malformed-input case with its outcome.

The fixture ``tests/fixtures/feeds/three_samples.hl7`` was written by hand from HL7 v2.5.1:
the ORU^R01 structure of chapter 7 section 7.3.1 (MSH, PID, PV1, ORC, OBR, OBX..., SPM), the
segment definitions of chapter 2 (MSH-9 message type, MSH-10 control id), chapter 3 (PID-3,
PID-7, PV1-3, PV1-19) and chapter 7 (OBR-3 filler order number, OBR-7 observation date/time,
OBR-10 collector, OBR-22 results report time; OBX-2 value type NM/SN/ST/CWE, OBX-3 with coding
system LN, OBX-5, OBX-6 UCUM units, OBX-11 result status of table 0085, OBX-18 equipment;
SPM-4 specimen type, SPM-7 collection method), DTM with offsets (chapter 2A, DTM), segments
ended by CR. Every file must balance: rows in = loaded + quarantined + duplicates + superseded.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path

import duckdb
import pytest

from pipeline.ingest.feeds.timestamps import hl7_to_utc
from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.profile import load_profile
from pipeline.store import open_store
from tests.feed_outcomes import counts

ROOT = Path(__file__).resolve().parent.parent
FIXTURE = ROOT / "tests" / "fixtures" / "feeds" / "three_samples.hl7"
PROFILE = load_profile(ROOT / "profiles" / "demo_hl7v2.toml")
KEY = b"feed-test-key-0123456789abcdef-0123"


@pytest.fixture
def con(tmp_path: Path) -> duckdb.DuckDBPyConnection:
    store = open_store(tmp_path / "store.duckdb")
    yield store
    store.close()


def messages() -> list[list[str]]:
    """The fixture's messages as lists of segments (CR-separated, HL7 v2.5.1 chapter 2 message construction rules)."""
    text = FIXTURE.read_bytes().decode("utf-8")  # bytes: read_text would turn CR into LF
    return [("MSH|" + m).rstrip("\r").split("\r") for m in text.split("MSH|")[1:]]


def join(*msgs: list[str], separator: str = "\r") -> str:
    return "".join(separator.join(m) + separator for m in msgs)


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_bytes(text.encode("utf-8"))
    return path


def load(con: duckdb.DuckDBPyConnection, path: Path, run: str = "run-1", profile=PROFILE) -> FileOutcome:
    outcome = ingest_file(con, path, profile, run, KEY)
    assert outcome.balanced, outcome
    return outcome


def first(number: int) -> list[str]:
    """The first message again as accession LAB09000nn (ORC-3, OBR-3) with its own MSH-10."""
    return [
        s.replace("LAB0000101", f"LAB09{number:05d}").replace("|SVH00001|", f"|C{number:05d}|") for s in messages()[0]
    ]


def obx(message: list[str], code: str) -> int:
    return next(i for i, s in enumerate(message) if s.startswith("OBX|") and s.split("|")[3].startswith(code + "^"))


def set_field(segment: str, number: int, value: str) -> str:
    fields = segment.split("|")
    fields[number] = value
    return "|".join(fields)


def test_three_samples_load_with_the_fields_the_standard_places(con):
    outcome = load(con, FIXTURE)
    assert counts(outcome) == (3, 3, 0, 0, 0)
    row = con.execute(
        "select sample_id, patient_id, birth_date, unit, encounter_id, analyser_id, operator_id, collected_at, "
        "resulted_at, sample_type, collection_method, o2_device, ph, pao2_mmhg, fio2 "
        "from records where sample_id = 'LAB0000101'"
    ).fetchall()[0]
    # OBR-3, PID-3, PID-7, PV1-3, PV1-19, OBX-18, OBR-10
    assert row[:7] == ("LAB0000101", "SVH-900001", row[2], "Heron ICU", "ENC-5001", "LAB-GAS-2", "RN-0042")
    assert str(row[2]) == "1959-04-02"
    # OBR-7 20261130021500-0600 is 08:15 UTC (DTM offset, chapter 2A)
    assert (str(row[7]), str(row[8])) == ("2026-11-30 08:15:00", "2026-11-30 08:21:00")
    # SPM-4 ART, SPM-7 ART LINE, OBX-5 CWE VENT MASK, mapped by the profile's code lists
    assert row[9:12] == ("arterial", "arterial_line", "venturi_mask")
    assert row[12] == 7.38 and row[13] == pytest.approx(9.80 * 7.50062, abs=0.01)  # kPa -> mmHg (from memory)
    assert row[14] == pytest.approx(0.35)
    # the second message has no SPM-4: its venous LOINC codes (system axis BldV) give the type
    assert con.execute("select sample_type from records where sample_id = 'LAB0000102'").fetchall() == [("venous",)]
    notes = con.execute("select field, comparator, result_status from record_value_notes").fetchall()
    # OBX-2 SN ">^80.0" keeps its comparator; OBX-2 ST "haemolysed" is a text result
    assert ("pao2_mmhg", ">", None) in notes and ("k_mmol_l", None, "haemolysed") in notes


def test_mllp_framing_and_line_feeds_are_tolerated(con, tmp_path):
    load(con, FIXTURE)
    # MLLP framing <VT> message <FS><CR> (the bytes of hl7.mllp START_BLOCK, END_BLOCK);
    # segments ended by LF instead of CR
    framed = "".join("\x0b" + join(m, separator="\n") + "\x1c\r" for m in messages())
    outcome = load(con, write(tmp_path, "framed.hl7", framed), run="run-2")
    # the same three records: duplicates of what the CR file loaded, nothing new
    assert counts(outcome) == (3, 0, 0, 3, 0)


def test_an_mllp_block_never_closed_is_a_truncated_message(con, tmp_path):
    msgs = messages()
    text = "".join("\x0b" + join(m) + "\x1c\r" for m in msgs[:2]) + "\x0b" + join(msgs[2])[:200]
    outcome = load(con, write(tmp_path, "cut.hl7", text))
    assert counts(outcome) == (3, 2, 1, 0, 0)
    assert con.execute("select reason_code from quarantine").fetchall() == [("MESSAGE_TRUNCATED",)]


def unknown_code(m: list[str]) -> list[str]:
    i = obx(m, "2708-6")
    m[i] = m[i].replace("2708-6^^LN", "2713-6^^LN")  # a LOINC code the profile does not map
    return [m]


def unknown_unit(m: list[str]) -> list[str]:
    i = obx(m, "2019-8")
    m[i] = set_field(m[i], 6, "psi^^UCUM")
    return [m]


def conflict(m: list[str]) -> list[str]:
    i = obx(m, "2744-1")
    m.insert(i + 1, set_field(set_field(m[i], 4, "2"), 5, "7.12"))  # another pH result, OBX-4 sub-id 2
    return [m]


def duplicate(m: list[str]) -> list[str]:
    i = obx(m, "2744-1")
    m.insert(i + 1, m[i])
    return [m]


def preliminary_then_final(m: list[str]) -> list[str]:
    early = [set_field(s, 11, "P") if s.startswith("OBX|") else s for s in m]
    early[obx(early, "2744-1")] = set_field(early[obx(early, "2744-1")], 5, "7.30")
    return [early, m]  # two messages: P first, then F


def all_preliminary(m: list[str]) -> list[str]:
    return [[set_field(s, 11, "P") if s.startswith("OBX|") else s for s in m]]


def one_wrong(m: list[str]) -> list[str]:
    later = [s for s in m if not s.startswith(("OBX|", "SPM|"))] + [set_field(m[obx(m, "2947-0")], 11, "W")]
    return [m, later]  # W: post original as wrong, for sodium


def no_pid(m: list[str]) -> list[str]:
    return [[s for s in m if not s.startswith("PID|")]]


def obx_before_obr(m: list[str]) -> list[str]:
    i = obx(m, "2744-1")
    rest = [s for j, s in enumerate(m) if j != i]
    return [[rest[0], m[i], *rest[1:]]]


def not_a_result(m: list[str]) -> list[str]:
    return [[m[0].replace("ORU^R01^ORU_R01", "ADT^A01^ADT_A01"), *m[1:]]]


def no_accession(m: list[str]) -> list[str]:
    return [[set_field(s, 3, "") if s.startswith(("OBR|", "ORC|")) else s for s in m]]


def local_time_skipped(m: list[str]) -> list[str]:
    # 02:30 on 8 March 2026 does not exist in America/Chicago (clocks go from 02:00 to 03:00)
    return [[set_field(s, 7, "202603080230") if s.startswith("OBR|") else s for s in m]]


def escaped_text(m: list[str]) -> list[str]:
    # \\T\\ is the escape sequence of the subcomponent separator &
    # (HL7 v2.5.1 chapter 2, escape sequences in text fields)
    return [[s.replace("Heron ICU", "Heron \\T\\ Egret ICU") if s.startswith("PV1|") else s for s in m]]


def sent_twice(m: list[str]) -> list[str]:
    return [m, list(m)]  # the same message again in the same file


def corrected_in_file(m: list[str]) -> list[str]:
    later = list(m)
    i = obx(later, "2744-1")
    later[i] = set_field(set_field(later[i], 5, "7.28"), 11, "C")
    return [m, later]  # the original, then its correction, in one file


# (case, the accession loads?, quarantine reasons of its messages, duplicate rows, rows superseded in the file).
# One record per order of each message: a second message of an accession is a second row, as a
# second CSV row of a sample is.
CASES = [
    (unknown_code, 0, ["UNKNOWN_OBSERVATION_CODE"], 0, 0),
    (unknown_unit, 0, ["UNIT_UNKNOWN"], 0, 0),
    (conflict, 0, ["CONFLICTING_VALUES"], 0, 0),
    (duplicate, 1, [], 0, 0),  # one OBX twice in a message: merged
    (preliminary_then_final, 1, ["PRELIMINARY_RESULT"], 0, 0),  # the P message held back, the F one loads
    (all_preliminary, 0, ["PRELIMINARY_RESULT"], 0, 0),
    (one_wrong, 1, ["RESULT_WITHDRAWN"], 0, 0),  # a later W message is recorded; the loaded value stays
    (no_pid, 0, ["SEGMENT_MISSING"], 0, 0),
    (obx_before_obr, 0, ["SEGMENT_MISSING"], 0, 0),
    (not_a_result, 0, ["MESSAGE_TYPE_UNSUPPORTED"], 0, 0),
    (no_accession, 0, ["ACCESSION_MISSING"], 0, 0),
    (local_time_skipped, 0, ["DST_NONEXISTENT"], 0, 0),
    (sent_twice, 1, [], 1, 0),  # the loader's duplicate in the file
    (corrected_in_file, 1, [], 0, 1),  # the loader's superseded in the file: the correction stands
    (escaped_text, 1, [], 0, 0),
]


def test_each_fault_in_one_file_reaches_its_own_outcome(con, tmp_path):
    msgs = list(messages())
    rows_in = 3
    for n, (edit, *_expected) in enumerate(CASES, start=1):
        case = edit(first(n))
        msgs += case
        rows_in += len(case)
    # the file ends in the middle of an OBX: the last message is truncated
    cut = first(99)
    cut[-2] = cut[-2][:20]
    text = join(*msgs) + join(cut[:-1]).rstrip("\r")
    outcome = load(con, write(tmp_path, "cases.hl7", text))

    loaded = 3 + sum(c[1] for c in CASES)
    quarantined = sum(len(c[2]) for c in CASES) + 1
    duplicates, superseded = sum(c[3] for c in CASES), sum(c[4] for c in CASES)
    assert counts(outcome) == (rows_in + 1, loaded, quarantined, duplicates, superseded)
    rows = [
        (r[0], json.loads(r[1])) for r in con.execute("select reason_code, original_text from quarantine").fetchall()
    ]
    for n, (edit, held, reasons, _d, _s) in enumerate(CASES, start=1):
        accession, control = f"LAB09{n:05d}", f"C{n:05d}"
        count = con.execute("select count(*) from records where sample_id = ?", [accession]).fetchall()[0][0]
        mine = [r for r, text in rows if accession in text or control in text]
        assert (count, mine) == (held, reasons), edit.__name__
    assert [r for r, text in rows if "C00099" in text] == ["MESSAGE_TRUNCATED"]

    def value(column: str, case: object) -> object:
        number = next(n for n, c in enumerate(CASES, start=1) if c[0] is case)
        return con.execute(f"select {column} from records where sample_id = ?", [f"LAB09{number:05d}"]).fetchall()[0][0]

    assert value("ph", preliminary_then_final) == 7.38  # the final value, not the preliminary 7.30
    assert value("na_mmol_l", one_wrong) == 139  # nothing removed by the withdrawal message
    assert value("ph", corrected_in_file) == 7.28
    assert value("unit", escaped_text) == "Heron & Egret ICU"
    # the original of the correction is kept, as for a CSV row superseded in its file
    assert con.execute("select ph from superseded_records").fetchall() == [(7.38,)]
    assert "duplicate observations merged: 1" in " | ".join(outcome.notes)


def test_text_before_the_first_msh_is_quarantined_and_never_logged(con, tmp_path, caplog):
    # a patient identifier in stray text must not reach a log (hl7.split_file logs such lines)
    text = "PID|1||SVH-999999^^^SVH^MR\r" + join(*messages())
    with caplog.at_level(logging.DEBUG):
        outcome = load(con, write(tmp_path, "stray.hl7", text))
    assert counts(outcome) == (4, 3, 1, 0, 0)
    assert con.execute("select reason_code from quarantine").fetchall() == [("SEGMENT_MISSING",)]
    assert "SVH-999999" not in caplog.text


def test_a_corrected_result_in_a_later_file_is_a_correction(con, tmp_path):
    load(con, FIXTURE)
    m = messages()[0]
    i = obx(m, "2744-1")
    m[i] = set_field(set_field(m[i], 5, "7.28"), 11, "C")  # OBX-11 C: record coming over is a correction
    outcome = load(con, write(tmp_path, "corrected.hl7", join(m)), run="run-2")
    assert counts(outcome) == (1, 1, 0, 0, 0) and outcome.corrections == 1
    assert con.execute("select ph from records where sample_id = 'LAB0000101'").fetchall() == [(7.28,)]
    assert con.execute("select ph from superseded_records").fetchall() == [(7.38,)]


def test_withdrawn_results_remove_nothing_and_are_recorded(con, tmp_path):
    load(con, FIXTURE)
    m = [set_field(s, 11, "W") if s.startswith("OBX|") else s for s in messages()[1]]
    outcome = load(con, write(tmp_path, "wrong.hl7", join(m)), run="run-2")
    assert counts(outcome) == (1, 0, 1, 0, 0)
    assert con.execute("select reason_code from quarantine").fetchall() == [("RESULT_WITHDRAWN",)]
    assert con.execute("select count(*) from records where sample_id = 'LAB0000102'").fetchall() == [(1,)]


def test_a_message_sent_again_in_a_later_file_is_a_duplicate(con, tmp_path):
    load(con, FIXTURE)
    outcome = load(con, write(tmp_path, "again.hl7", join(messages()[2])), run="run-2")
    assert counts(outcome) == (1, 0, 0, 1, 0)


def test_encoding_is_the_profiles(con, tmp_path):
    latin = FIXTURE.read_bytes().decode("utf-8").replace("Heron ICU", "Héron ICU").encode("latin-1")
    path = tmp_path / "latin1.hl7"
    path.write_bytes(latin)
    rejected = ingest_file(con, path, PROFILE, "run-1", KEY)
    assert (rejected.outcome, rejected.reason_code) == ("rejected", "ENCODING_INVALID")
    # a profile declaring Latin-1 (MSH-18 8859/1 senders) reads the same bytes
    text = (
        (ROOT / "profiles" / "demo_hl7v2.toml")
        .read_text(encoding="utf-8")
        .replace('encoding = "utf-8"', 'encoding = "latin-1"')
    )
    (tmp_path / "latin.toml").write_text(text, encoding="utf-8")
    outcome = load(con, path, run="run-2", profile=load_profile(tmp_path / "latin.toml"))
    assert counts(outcome) == (3, 3, 0, 0, 0)
    assert con.execute("select unit from records where sample_id = 'LAB0000101'").fetchall() == [("Héron ICU",)]


@pytest.mark.parametrize(
    ("dtm", "utc"),
    [
        ("20261130021500-0600", "2026-11-30 08:15:00"),  # offset given (chapter 2A DTM)
        ("20261130081500+0000", "2026-11-30 08:15:00"),
        ("202611300215", "2026-11-30 08:15:00"),  # no offset: Chicago standard time, UTC-6 (tz database)
        ("202607010215", "2026-07-01 07:15:00"),  # Chicago daylight time, UTC-5
        ("20261130", "20261130"),  # a date only is handed on as written for the loader to reject
    ],
)
def test_hl7_times_become_utc(dtm, utc):
    assert hl7_to_utc(dtm, "America/Chicago") == utc


def test_a_local_time_passed_twice_is_ambiguous():
    # 01:30 on 1 November 2026 happens twice in America/Chicago (clocks go back at 02:00)
    with pytest.raises(ValueError) as problem:
        hl7_to_utc("202611010130", "America/Chicago")
    assert getattr(problem.value, "reason", None) == "DST_AMBIGUOUS"
