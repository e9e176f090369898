"""Ingestion of real-world export faults: every row ends in exactly one place.

Each test loads a small hand-written export and checks the outcome, the reason code and
the reconciliation ``rows in = loaded + quarantined + duplicates + superseded in file``
against both the returned counts and the tables in the store.
"""

from __future__ import annotations

import re
from datetime import datetime
from pathlib import Path

import duckdb
import pint
import polars as pl
import pytest

from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.profile import Profile, load_profile
from pipeline.store import open_store

FIXTURES = Path(__file__).parent / "fixtures"
PROFILES = Path(__file__).parent.parent / "profiles"
KEY = b"test-key-0123456789abcdef"
HEADER = "id,mrn,ward,collected,resulted,type,device,fio2,ph,pco2,po2,hco3\n"
GOOD_ROW = "S{n},P{n},W1,2026-03-02 10:{n:02d},2026-03-02 10:{m:02d},A,RA,0.21,7.40,40,95,24\n"

ureg = pint.UnitRegistry()


def profile_allowing(tmp_path: Path, source: Path, present: list[str]) -> Profile:
    """A copy of a profile whose mapped columns not in ``present`` are marked optional, for
    small hand-written exports that carry only a few of a demo layout's columns."""
    original = load_profile(source)
    folded = {p.casefold() for p in present}
    absent = [s for s in original.columns.values() if s.casefold() not in folded]
    text = source.read_text(encoding="utf-8").replace(
        "[profile]\n", "[profile]\noptional_columns = [" + ", ".join(f'"{a}"' for a in absent) + "]\n", 1
    )
    path = tmp_path / f"optional_{source.name}"
    path.write_text(text, encoding="utf-8")
    return load_profile(path)


def good_rows(count: int, start: int = 1) -> str:
    return "".join(GOOD_ROW.format(n=i, m=i + 5) for i in range(start, start + count))


@pytest.fixture
def store(tmp_path: Path) -> duckdb.DuckDBPyConnection:
    con = open_store(tmp_path / "store.duckdb")
    yield con
    con.close()


@pytest.fixture
def minimal() -> Profile:
    return load_profile(FIXTURES / "profiles" / "minimal.toml")


def load(
    con: duckdb.DuckDBPyConnection,
    tmp_path: Path,
    content: str | bytes,
    profile: Profile,
    name: str = "export.csv",
    run_id: str = "r1",
) -> FileOutcome:
    path = tmp_path / name
    path.write_bytes(content.encode("utf-8") if isinstance(content, str) else content)
    outcome = ingest_file(con, path, profile, run_id, KEY)
    assert_reconciled(con, outcome)
    return outcome


def assert_reconciled(con: duckdb.DuckDBPyConnection, f: FileOutcome) -> None:
    """The returned counts balance, and the store holds exactly what they say."""
    assert f.balanced, f
    if f.outcome != "loaded":
        return
    held = con.execute("select count(*) from records where file_sha256 = ?", [f.sha256]).fetchall()[0][0]
    quarantined = con.execute("select count(*) from quarantine where file_sha256 = ?", [f.sha256]).fetchall()[0][0]
    assert quarantined == f.rows_quarantined
    # Records from this file may later be replaced, never within the same load.
    assert held == f.rows_loaded


def reasons(con: duckdb.DuckDBPyConnection) -> list[tuple[int, str]]:
    return con.execute("select source_row, reason_code from quarantine order by source_row").fetchall()


def test_clean_file_loads_every_row(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER + good_rows(3), minimal)
    assert (f.outcome, f.rows_in, f.rows_loaded) == ("loaded", 3, 3)
    row = store.execute(
        "select collected_at, fio2, pao2_mmhg, patient_key, patient_id from records where sample_id = 'S1'"
    ).fetchall()[0]
    # 10:01 London time on 2 March (GMT, UTC+0) is 10:01 UTC (IANA tz database).
    assert str(row[0]) == "2026-03-02 10:01:00"
    assert row[1] == pytest.approx(0.21) and row[2] == pytest.approx(95)
    assert row[3] is not None and "P1" not in row[3]


def test_the_profile_hash_is_kept_with_each_loaded_file(store, tmp_path, minimal):
    # The hash is SHA-256 of the profile file's bytes (hashlib, the standard library's
    # implementation of FIPS 180-4), so any edit of the profile changes it.
    import hashlib

    f = load(store, tmp_path, HEADER + good_rows(2), minimal)
    expected = hashlib.sha256((FIXTURES / "profiles" / "minimal.toml").read_bytes()).hexdigest()
    assert minimal.sha256 == expected
    held = store.execute("select profile, profile_sha256 from ingested_files where file_sha256 = ?", [f.sha256])
    assert held.fetchall() == [("test_minimal", expected)]


def test_utf8_bom_is_stripped(store, tmp_path, minimal):
    f = load(store, tmp_path, b"\xef\xbb\xbf" + (HEADER + good_rows(2)).encode(), minimal)
    assert f.outcome == "loaded" and f.rows_loaded == 2
    assert "BOM_STRIPPED" in f.notes


def test_latin1_bytes_under_utf8_profile_reject_the_file(store, tmp_path, minimal):
    content = (HEADER + good_rows(1).replace("W1", "Station Süd")).encode("latin-1")
    f = load(store, tmp_path, content, minimal)
    assert (f.outcome, f.reason_code) == ("rejected", "ENCODING_INVALID")
    assert "line 2" in (f.message or "")


def test_latin1_profile_decodes_latin1(store, tmp_path):
    header = "Probennummer;Patienten-ID;Station;Entnahme;Material;O2-Gerät;FiO2;pH;pCO2;pO2;HCO3\n"
    profile = profile_allowing(tmp_path, PROFILES / "demo_eu_style.toml", header.strip().split(";"))
    row = "E1;P9;Intensivstation Süd;02.03.2026 11:15;arteriell;Raumluft;0,21;7,40;5,3;12,0;24,1\n"
    f = load(store, tmp_path, (header + row).encode("latin-1"), profile)
    assert f.outcome == "loaded", f.message
    unit, paco2, pao2, hco3, collected = store.execute(
        "select unit, paco2_mmhg, pao2_mmhg, hco3_mmol_l, collected_at from records"
    ).fetchall()[0]
    assert unit == "Intensivstation Süd"
    # Oracle: pint's kPa -> mmHg; 5.3 kPa = 39.75 mmHg, 12 kPa = 90.01 mmHg (domain notes section 11).
    assert paco2 == pytest.approx(ureg.Quantity(5.3, "kPa").to("mmHg").magnitude, rel=1e-5)
    assert pao2 == pytest.approx(ureg.Quantity(12.0, "kPa").to("mmHg").magnitude, rel=1e-5)
    assert hco3 == pytest.approx(24.1)
    # 11:15 in Berlin in March before the clock change is CET, UTC+1 (IANA tz database).
    assert str(collected) == "2026-03-02 10:15:00"


def test_decimal_point_in_decimal_comma_file_rejects_the_file(store, tmp_path):
    header = "Probennummer;Entnahme;pH;pCO2\n"
    profile = profile_allowing(tmp_path, PROFILES / "demo_eu_style.toml", header.strip().split(";"))
    rows = "".join(f"E{i};02.03.2026 11:15;7.40;5.3\n" for i in range(5))
    f = load(store, tmp_path, header + rows, profile)
    assert (f.outcome, f.reason_code) == ("rejected", "DIALECT_MISMATCH")


def test_quoted_newline_stays_in_one_record(store, tmp_path, minimal):
    content = HEADER + good_rows(1) + 'S2,P2,"Ward\nNorth",2026-03-02 10:02,2026-03-02 10:07,A,RA,0.21,7.40,40,95,24\n'
    content += good_rows(1, start=3)
    f = load(store, tmp_path, content, minimal)
    assert (f.rows_in, f.rows_loaded) == (3, 3)
    assert store.execute("select source_row, unit from records where sample_id = 'S3'").fetchall() == [(3, "W1")]


def test_truncated_last_record_is_quarantined(store, tmp_path, minimal):
    content = HEADER + good_rows(2) + "S3,P3,W1,2026-03-02 10:03"
    f = load(store, tmp_path, content, minimal)
    assert (f.rows_in, f.rows_loaded, f.rows_quarantined) == (3, 2, 1)
    assert reasons(store) == [(3, "TRUNCATED_RECORD")]


def test_unterminated_quote_is_quarantined(store, tmp_path, minimal):
    content = HEADER + good_rows(2) + 'S3,P3,"W1,2026-03-02 10:03,2026-03-02 10:07,A,RA,0.21,7.4,40,95,24\n'
    f = load(store, tmp_path, content, minimal)
    assert (f.rows_loaded, f.rows_quarantined) == (2, 1)
    assert reasons(store)[0][1] == "UNTERMINATED_QUOTE"


def test_row_with_too_many_fields_is_quarantined(store, tmp_path, minimal):
    content = HEADER + good_rows(1) + "S2,P2,W1,2026-03-02 10:02,2026-03-02 10:07,A,RA,0.21,7,40,40,95,24\n"
    f = load(store, tmp_path, content + good_rows(1, start=3), minimal)
    assert (f.rows_in, f.rows_loaded) == (3, 2)
    assert reasons(store) == [(2, "TOO_MANY_FIELDS")]


def test_header_only_file_loads_nothing(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER, minimal)
    assert (f.outcome, f.rows_in) == ("loaded", 0)


def test_empty_file_is_rejected(store, tmp_path, minimal):
    f = load(store, tmp_path, b"", minimal)
    assert (f.outcome, f.reason_code) == ("rejected", "EMPTY_FILE")


def test_missing_required_column_is_rejected(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER.replace("collected,", "taken,") + good_rows(1), minimal)
    assert (f.outcome, f.reason_code) == ("rejected", "MISSING_COLUMN")
    assert "'collected'" in (f.message or "")


def test_duplicated_column_is_rejected(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER.replace("hco3", "ph") + good_rows(1), minimal)
    assert (f.outcome, f.reason_code) == ("rejected", "DUPLICATE_COLUMN")


def test_a_mapped_column_missing_from_the_file_rejects_it(store, tmp_path, minimal):
    # The PaO2 column disappeared from the export: loading every record with PaO2 empty
    # would be a silent failure, so the file is rejected and the message names the column
    # and the profile.
    header = HEADER.replace(",po2,", ",comment,")
    f = load(store, tmp_path, header + good_rows(2), minimal)
    assert (f.outcome, f.reason_code) == ("rejected", "MISSING_COLUMN")
    assert "'po2' (pao2_mmhg)" in (f.message or "") and "test_minimal" in (f.message or "")
    assert "optional_columns" in (f.message or "")
    assert store.execute("select count(*) from records").fetchall() == [(0,)]


def test_a_column_marked_optional_may_be_missing_and_is_noted(store, tmp_path):
    profile = profile_allowing(tmp_path, FIXTURES / "profiles" / "minimal.toml", HEADER.strip().split(",")[:-1])
    assert profile.is_optional(" HCO3 ") and not profile.is_optional("po2")
    header = HEADER.replace(",hco3\n", ",comment\n")
    f = load(store, tmp_path, header + good_rows(2), profile)
    assert f.outcome == "loaded" and f.rows_loaded == 2
    assert any("hco3_mmol_l" in n for n in f.notes) and any("not mapped" in n for n in f.notes)
    assert store.execute("select count(hco3_mmol_l) from records").fetchall() == [(0,)]


@pytest.mark.parametrize(
    ("line", "problem"),
    [
        ('optional_columns = ["nope"]', "not a source column in [columns]"),
        ('optional_columns = ["collected"]', "the column of the required field collected_at"),
        ('optional_columns = "hco3"', "must be a list of source headers"),
    ],
)
def test_optional_columns_are_checked_when_the_profile_loads(tmp_path, line, problem):
    from pipeline.errors import ConfigError

    text = (FIXTURES / "profiles" / "minimal.toml").read_text(encoding="utf-8")
    path = tmp_path / "p.toml"
    path.write_text(text.replace("[profile]\n", f"[profile]\n{line}\n", 1), encoding="utf-8")
    with pytest.raises(ConfigError, match=re.escape(problem)):
        load_profile(path)


def test_wrong_delimiter_is_rejected(store, tmp_path, minimal):
    f = load(store, tmp_path, (HEADER + good_rows(2)).replace(",", ";"), minimal)
    assert (f.outcome, f.reason_code) == ("rejected", "DIALECT_MISMATCH")
    assert "';'" in (f.message or "")


def test_qualified_values_keep_number_and_comparator(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER + good_rows(1).replace(",95,", ",>600,").replace(",7.40,", ",<6.8,"), minimal)
    assert f.rows_loaded == 1
    assert store.execute("select ph, pao2_mmhg from records").fetchall() == [(6.8, 600.0)]
    notes = store.execute("select field, comparator, original_text from record_value_notes order by field").fetchall()
    assert notes == [("pao2_mmhg", ">", ">600"), ("ph", "<", "<6.8")]


@pytest.mark.parametrize(
    ("text", "status"),
    [("haemolysed", "haemolysed"), ("Clotted", "clotted"), ("CANCELLED", "cancelled"), ("see comment", "see_comment")],
)
def test_text_results_become_a_result_status(store, tmp_path, minimal, text, status):
    f = load(store, tmp_path, HEADER + good_rows(1).replace(",95,", f",{text},"), minimal)
    assert f.rows_loaded == 1
    assert store.execute("select pao2_mmhg, result_status from records").fetchall() == [(None, status)]


def test_unparseable_text_is_quarantined_with_its_original(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER + good_rows(2) + good_rows(1, start=3).replace(",95,", ",ninety,"), minimal)
    assert (f.rows_loaded, f.rows_quarantined) == (2, 1)
    row, reason, failed, original, sample = store.execute(
        "select source_row, reason_code, failed_columns, original_text, sample_id from quarantine"
    ).fetchall()[0]
    assert (row, reason, failed, sample) == (3, "NOT_A_NUMBER", "pao2_mmhg:NOT_A_NUMBER", "S3")
    assert '"po2":"ninety"' in original


def test_non_finite_numbers_are_quarantined(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER + good_rows(2) + good_rows(1, start=3).replace(",40,", ",NaN,"), minimal)
    assert reasons(store) == [(3, "NON_FINITE")] and f.rows_loaded == 2


def test_impossible_values_are_quarantined(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER + good_rows(2) + good_rows(1, start=3).replace(",95,", ",-95,"), minimal)
    assert reasons(store) == [(3, "IMPLAUSIBLE")] and f.rows_loaded == 2


def test_unknown_code_is_quarantined(store, tmp_path, minimal):
    f = load(store, tmp_path, HEADER + good_rows(3) + good_rows(1, start=4).replace(",RA,", ",JET,"), minimal)
    assert reasons(store) == [(4, "UNKNOWN_CODE")] and f.rows_loaded == 3


def test_per_row_unit_column_converts_mixed_kpa_and_mmhg(store, tmp_path):
    profile = load_profile(FIXTURES / "profiles" / "unit_column.toml")
    content = (
        "id,collected,pco2,pressure_unit,po2,pressure_unit_o2\n"
        "U1,2026-03-02 10:00,40,mmHg,95,mmHg\n"
        "U2,2026-03-02 10:00,5.3,kPa,12.0,kPa\n"
        "U3,2026-03-02 10:00,5.3,bar,12.0,kPa\n"
    )
    f = load(store, tmp_path, content, profile)
    assert (f.rows_loaded, f.rows_quarantined) == (2, 1)
    got = dict(store.execute("select sample_id, paco2_mmhg from records").fetchall())
    assert got["U1"] == pytest.approx(40.0)
    # Oracle: pint conversion of 5.3 kPa to mmHg.
    assert got["U2"] == pytest.approx(ureg.Quantity(5.3, "kPa").to("mmHg").magnitude, rel=1e-5)
    assert reasons(store) == [(3, "UNIT_UNKNOWN")]


def test_whole_file_in_the_wrong_unit_is_rejected_with_a_hint(store, tmp_path, minimal):
    rows = "".join(GOOD_ROW.format(n=i, m=i + 5).replace(",40,95,", ",5.3,12.6,") for i in range(1, 8))
    f = load(store, tmp_path, HEADER + rows, minimal)
    assert (f.outcome, f.reason_code) == ("rejected", "UNIT_MISMATCH")
    assert "kPa" in (f.message or "")


def test_one_unparseable_date_is_quarantined(store, tmp_path, minimal):
    f = load(
        store, tmp_path, HEADER + good_rows(3) + good_rows(1, start=4).replace("2026-03-02 10:04", "yesterday"), minimal
    )
    assert reasons(store) == [(4, "DATE_UNPARSEABLE")] and f.rows_loaded == 3


def test_dates_in_another_format_reject_the_file(store, tmp_path, minimal):
    content = HEADER + good_rows(4).replace("2026-03-02", "02/03/2026")
    f = load(store, tmp_path, content, minimal)
    assert (f.outcome, f.reason_code) == ("rejected", "DATE_FORMAT_MISMATCH")


def test_dst_ambiguous_and_nonexistent_local_times_are_quarantined(store, tmp_path, minimal):
    # Europe/London: 2026-10-25 01:30 happens twice; 2026-03-29 01:30 never happens (IANA tz database).
    rows = good_rows(3)
    rows += good_rows(1, start=4).replace("2026-03-02 10:04", "2026-10-25 01:30")
    rows += good_rows(1, start=5).replace("2026-03-02 10:05", "2026-03-29 01:30")
    f = load(store, tmp_path, HEADER + rows, minimal)
    assert reasons(store) == [(4, "DST_AMBIGUOUS"), (5, "DST_NONEXISTENT")]
    assert f.rows_loaded == 3


def test_duplicates_and_versions_within_one_file(store, tmp_path, minimal):
    content = HEADER + good_rows(2) + good_rows(1, start=1) + good_rows(1, start=2).replace(",95,", ",97,")
    f = load(store, tmp_path, content, minimal)
    assert (f.rows_in, f.rows_loaded, f.rows_duplicate, f.rows_superseded_in_file) == (4, 2, 1, 1)
    assert store.execute("select pao2_mmhg from records where sample_id = 'S2'").fetchall() == [(97.0,)]
    assert store.execute("select pao2_mmhg from superseded_records where sample_id = 'S2'").fetchall() == [(95.0,)]


def test_same_sample_in_a_later_file_is_a_duplicate_or_a_correction(store, tmp_path, minimal):
    load(store, tmp_path, HEADER + good_rows(2), minimal, name="day1.csv")
    second = HEADER + good_rows(1) + good_rows(1, start=2).replace(",95,", ",88,") + good_rows(1, start=3)
    f = load(store, tmp_path, second, minimal, name="day2.csv", run_id="r2")
    assert (f.rows_in, f.rows_loaded, f.rows_duplicate, f.corrections) == (3, 2, 1, 1)
    assert store.execute("select pao2_mmhg, version from records where sample_id = 'S2'").fetchall() == [(88.0, 2)]
    old = store.execute("select pao2_mmhg, superseded_in_run from superseded_records").fetchall()
    assert old == [(95.0, "r2")]
    assert store.execute("select count(*) from records").fetchall()[0][0] == 3


def test_redelivered_file_adds_nothing(store, tmp_path, minimal):
    load(store, tmp_path, HEADER + good_rows(3), minimal, name="a.csv")
    f = load(store, tmp_path, HEADER + good_rows(3), minimal, name="a_again.csv", run_id="r2")
    assert f.outcome == "already_loaded"
    assert store.execute("select count(*) from records").fetchall()[0][0] == 3


def test_failure_inside_a_file_leaves_none_of_it(store, tmp_path, minimal, monkeypatch):
    import pipeline.ingest.load as load_module

    def explode(*args, **kwargs):
        raise RuntimeError("disk trouble")

    monkeypatch.setattr(load_module, "_quarantine_rows", explode)
    path = tmp_path / "x.csv"
    path.write_text(HEADER + good_rows(3))
    with pytest.raises(RuntimeError):
        ingest_file(store, path, minimal, "r1", KEY)
    counts = store.execute(
        "select (select count(*) from records), (select count(*) from superseded_records), "
        "(select count(*) from ingested_files), (select count(*) from quarantine)"
    ).fetchall()
    assert counts == [(0, 0, 0, 0)]


def test_parquet_export_loads_and_corrupt_parquet_is_rejected(store, tmp_path):
    columns = ["sample_id", "collected_at", "fio2", "pao2_mmhg"]
    profile = profile_allowing(tmp_path, PROFILES / "demo_parquet.toml", columns)
    frame = pl.DataFrame(
        {
            "sample_id": ["Q1", "Q2"],
            "collected_at": [datetime(2026, 3, 2, 10), datetime(2026, 3, 2, 11)],
            "fio2": [0.21, 0.4],
            "pao2_mmhg": [95.0, 150.0],
        }
    )
    path = tmp_path / "p.parquet"
    frame.write_parquet(path)
    f = ingest_file(store, path, profile, "r1", KEY)
    assert (f.outcome, f.rows_loaded) == ("loaded", 2)
    assert_reconciled(store, f)
    broken = tmp_path / "broken.parquet"
    broken.write_bytes(path.read_bytes()[:-20])
    g = ingest_file(store, broken, profile, "r1", KEY)
    assert (g.outcome, g.reason_code) == ("rejected", "PARQUET_CORRUPT")


def test_quarantine_and_logs_never_hold_the_pseudonym_key(store, tmp_path, minimal):
    load(store, tmp_path, HEADER + good_rows(2), minimal)
    keys = [r[0] for r in store.execute("select patient_key from records").fetchall()]
    assert all(len(k) == 32 and KEY.decode() not in k for k in keys)
    assert len(set(keys)) == 2


# --------------------------------------------------------------------------------------
# Fields added for the prescribing audit: encounter, target range, o2_prescribed,
# collection method, operator
# --------------------------------------------------------------------------------------

NEW_FIELDS_HEADER = HEADER.rstrip("\n") + ",enc,tlow,thigh,o2rx,method,op\n"


def new_fields_profile(folder: Path, codes: bool = True) -> Path:
    """The minimal test profile plus the new sample fields, targets charted as fractions."""
    text = (FIXTURES / "profiles" / "minimal.toml").read_text(encoding="utf-8")
    text = text.replace(
        'hco3_mmol_l = "hco3"\n',
        'hco3_mmol_l = "hco3"\nencounter_id = "enc"\ntarget_spo2_low_pct = "tlow"\n'
        'target_spo2_high_pct = "thigh"\no2_prescribed = "o2rx"\ncollection_method = "method"\n'
        'operator_id = "op"\n',
    )
    text = text.replace('fio2 = "fraction"\n', 'fio2 = "fraction"\ntarget_spo2_low_pct = "fraction"\n'
                        'target_spo2_high_pct = "fraction"\n')
    if codes:
        text += '\n[codes.collection_method]\n"ART" = "arterial_puncture"\n"LINE" = "arterial_line"\n'
    path = folder / "new_fields.toml"
    path.write_text(text, encoding="utf-8")
    return path


def new_fields_rows() -> str:
    """Hand-counted: S1, S2 and S5 load; S3 (unmapped method "XX") and S4 (o2_prescribed
    "maybe") are quarantined. rows in 5 = loaded 3 + quarantined 2."""
    base = good_rows(5).splitlines()
    extra = [
        ",E1,0.88,0.92,Y,ART,OP-1",
        ",E1,0.94,0.98,N,LINE,OP-2",
        ",E2,0.94,0.98,Y,XX,OP-1",
        ",E2,0.94,0.98,maybe,ART,OP-1",
        ",,,,,,",
    ]
    return "".join(row + cells + "\n" for row, cells in zip(base, extra, strict=True))


def test_new_sample_fields_parse_convert_code_map_and_pseudonymise(store, tmp_path):
    profile = load_profile(new_fields_profile(tmp_path))
    f = load(store, tmp_path, NEW_FIELDS_HEADER + new_fields_rows(), profile)
    assert (f.rows_in, f.rows_loaded, f.rows_quarantined) == (5, 3, 2)  # hand-counted
    assert reasons(store) == [(3, "UNKNOWN_CODE"), (4, "INVALID_BOOLEAN")]
    failed = store.execute("select failed_columns from quarantine order by source_row").fetchall()
    assert failed == [("collection_method:UNKNOWN_CODE",), ("o2_prescribed:INVALID_BOOLEAN",)]
    rows = store.execute(
        "select sample_id, encounter_id, encounter_key, target_spo2_low_pct, target_spo2_high_pct, o2_prescribed, "
        "collection_method, operator_id, operator_key from records order by sample_id"
    ).fetchall()
    s1, s2, s5 = rows
    # Oracle: pint, a fraction of 0.88 is 88 percent.
    assert s1[3] == pytest.approx(ureg.Quantity(0.88, "dimensionless").to("percent").magnitude)
    assert s1[4] == pytest.approx(ureg.Quantity(0.92, "dimensionless").to("percent").magnitude)
    assert (s1[5], s1[6], s2[5], s2[6]) == (True, "arterial_puncture", False, "arterial_line")
    assert (s1[1], s1[7]) == ("E1", "OP-1")  # raw ids kept, as patient_id is (keep_patient_id defaults to true)
    # Same encounter, same key; different operators, different keys; none shows the raw id.
    assert s1[2] == s2[2] and s1[8] != s2[8]
    assert all(len(k) == 32 and "E1" not in k and "OP" not in k for k in (s1[2], s1[8], s2[8]))
    assert s5[1:] == (None,) * 8  # unmapped cells stay NULL, the record loads


def test_new_identifiers_are_not_stored_raw_when_the_site_keeps_none(store, tmp_path):
    profile = load_profile(new_fields_profile(tmp_path))
    path = tmp_path / "export.csv"
    path.write_text(NEW_FIELDS_HEADER + new_fields_rows(), encoding="utf-8")
    f = ingest_file(store, path, profile, "r1", KEY, keep_patient_id=False)
    assert f.rows_loaded == 3
    counts = store.execute(
        "select count(patient_id), count(encounter_id), count(operator_id), count(encounter_key), count(operator_key) "
        "from records"
    ).fetchall()
    assert counts == [(0, 0, 0, 2, 2)]  # S5 has neither; hand-counted


def test_collection_method_needs_its_code_map(tmp_path):
    from pipeline.errors import ConfigError

    with pytest.raises(ConfigError, match=r"\[codes.collection_method\] is needed"):
        load_profile(new_fields_profile(tmp_path, codes=False))


def test_a_sample_without_the_new_fields_keeps_its_content_hash(store, tmp_path, minimal):
    """A store loaded before the new fields existed must see a re-delivery of the same
    values as a duplicate, not a correction: the hash of a record that carries none of them
    is the earlier formula (copied here from the release before the fields)."""
    load(store, tmp_path, HEADER + good_rows(3), minimal)
    mismatched = store.execute(
        """
        select count(*) from records
        where content_hash <> hash(patient_id, unit, analyser_id, age_years, birth_date, collected_at, resulted_at,
             sample_type, o2_device, o2_flow_l_min, fio2, barometric_pressure_mmhg, temperature_c,
             ph, paco2_mmhg, pao2_mmhg, hco3_mmol_l, base_excess_mmol_l, sao2_pct,
             sao2_is_calculated, spo2_pct, hb_g_dl, na_mmol_l, k_mmol_l, cl_mmol_l,
             lactate_mmol_l, mean_airway_pressure_cmh2o, peep_cmh2o, hypercapnic_risk,
             result_status, glucose_mmol_l, cohb_pct, methb_pct)
        """
    ).fetchall()
    assert mismatched == [(0,)]
    # The same samples delivered again with a collection method: a correction of each.
    profile = load_profile(new_fields_profile(tmp_path))
    rows = "".join(row + ",,,,,ART,\n" for row in good_rows(3).splitlines())
    f = load(store, tmp_path, NEW_FIELDS_HEADER + rows, profile, name="b.csv")
    assert (f.rows_loaded, f.corrections) == (3, 3)
    assert store.execute("select count(*) from superseded_records").fetchall() == [(3,)]


def test_an_old_store_gains_the_new_columns(tmp_path):
    """A store made before the prescribing fields: opening it adds every new column (NULL,
    or the kind 'sample' for earlier quarantine rows) and it loads both kinds afterwards."""
    path = tmp_path / "old.duckdb"
    con = open_store(path)
    con.execute("insert into quarantine (run_id, sample_id, reason_code) values ('r0', 'S-OLD', 'NOT_A_NUMBER')")
    new_record_columns = ("encounter_id", "encounter_key", "target_spo2_low_pct", "target_spo2_high_pct",
                          "o2_prescribed", "collection_method", "operator_id", "operator_key")
    dropped = {
        "records": new_record_columns,
        "superseded_records": new_record_columns,
        "quarantine": ("record_kind", "record_id"),
        "merged_duplicates": ("record_kind", "record_id"),
        "ingested_files": ("kind", "profile_sha256"),
    }
    for table, columns in dropped.items():
        for column in columns:
            con.execute(f"alter table {table} drop column {column}")
    con.execute("drop table superseded_prescriptions")
    con.execute("drop table prescriptions")
    con.close()

    con = open_store(path)
    try:
        present = {
            (t, c) for t, c in con.execute("select table_name, column_name from information_schema.columns").fetchall()
        }
        for table, columns in dropped.items():
            for column in columns:
                assert (table, column) in present, (table, column)
        assert ("prescriptions", "prescription_id") in present and ("superseded_prescriptions", "version") in present
        old = con.execute("select record_kind, record_id from quarantine where sample_id = 'S-OLD'").fetchall()
        assert old == [("sample", "S-OLD")]
        profile = load_profile(new_fields_profile(tmp_path))
        f = load(con, tmp_path, NEW_FIELDS_HEADER + new_fields_rows(), profile)
        assert f.rows_loaded == 3
        kinds = con.execute("select distinct kind from ingested_files").fetchall()
        assert kinds == [("samples",)]
    finally:
        con.close()


# --------------------------------------------------------------------------------------
# records has no primary key: the merge keeps sample_id unique and a check proves it
# --------------------------------------------------------------------------------------


def test_sample_ids_stay_unique_without_a_primary_key(store, tmp_path, minimal):
    """Repeats within a file, duplicates and corrections across files: one row per
    sample_id (counted against count distinct; the hand-written files hold 5 samples)."""
    constraints = store.execute(
        "select count(*) from duckdb_constraints() where table_name in ('records', 'prescriptions') "
        "and constraint_type = 'PRIMARY KEY'"
    ).fetchall()
    assert constraints == [(0,)]  # a new store is made without the key
    load(store, tmp_path, HEADER + good_rows(3) + good_rows(1, start=2), minimal, name="day1.csv")
    second = HEADER + good_rows(1).replace(",95,", ",91,") + good_rows(2, start=3) + good_rows(1, start=3)
    load(store, tmp_path, second.replace(",24\n", ",25\n"), minimal, name="day2.csv", run_id="r2")
    third = HEADER + good_rows(5)
    load(store, tmp_path, third, minimal, name="day3.csv", run_id="r3")
    total, distinct = store.execute("select count(*), count(distinct sample_id) from records").fetchall()[0]
    assert (total, distinct) == (5, 5)


def test_a_merge_that_would_repeat_a_key_rolls_the_file_back(store, tmp_path, minimal, monkeypatch):
    import pipeline.ingest.load as load_module

    real_run_sql = load_module.run_sql

    def broken_merge(con, relative_path, **params):
        real_run_sql(con, relative_path, **params)
        if relative_path == "ingest/40_merge.sql":  # a merge that forgot its anti-join
            con.execute("insert into records select * from records where sample_id = 'S1'")

    load(store, tmp_path, HEADER + good_rows(2), minimal, name="day1.csv")
    monkeypatch.setattr(load_module, "run_sql", broken_merge)
    path = tmp_path / "day2.csv"
    path.write_text(HEADER + good_rows(3), encoding="utf-8")
    with pytest.raises(load_module.DuplicateKeyError, match="beyond one per sample_id"):
        ingest_file(store, path, minimal, "r2", KEY)
    assert store.execute("select count(*), count(distinct sample_id) from records").fetchall() == [(2, 2)]
    assert store.execute("select count(*) from ingested_files").fetchall() == [(1,)]


def test_cp1252_export_is_read_by_the_python_reader_and_loads(store, tmp_path):
    # DuckDB has no cp1252 decoder without an extension; the Python reader decodes the file
    # and the same SQL types its cells. Byte 0x80 is the euro sign in cp1252 (the Windows-1252
    # code page table, as Python's codec implements it).
    text = (FIXTURES / "profiles" / "minimal.toml").read_text(encoding="utf-8")
    path = tmp_path / "cp1252.toml"
    path.write_text(text.replace('encoding = "utf-8"', 'encoding = "cp1252"'), encoding="utf-8")
    profile = load_profile(path)
    content = (HEADER + good_rows(2).replace("W1", "Ward \u20ac")).encode("cp1252")
    assert b"\x80" in content
    f = load(store, tmp_path, content, profile)
    assert (f.outcome, f.rows_loaded) == ("loaded", 2)
    assert store.execute("select distinct unit from records").fetchall() == [("Ward \u20ac",)]
