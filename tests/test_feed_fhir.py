"""FHIR R4 bulk exports through the loader: every malformed-input case with its outcome.

The fixture ``tests/fixtures/feeds/three_samples.ndjson`` was written by hand from FHIR R4:
Observation (observation.html: status, code, subject, encounter, effectiveDateTime, issued,
device, specimen, valueQuantity with UCUM ``code``, valueString, valueCodeableConcept),
Specimen (specimen.html: accessionIdentifier, type from HL7 table 0487, collection),
Patient and Encounter (``class`` is 1..1 in R4), NDJSON one resource a line (FHIR Bulk Data
Access, ndjson). Each case below edits it and states the expected outcome; every file must
balance: rows in = loaded + quarantined + duplicates + superseded.
"""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import pytest

from pipeline.errors import ConfigError
from pipeline.ingest.feeds.fhir import model_problem
from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.profile import load_profile
from pipeline.store import open_store
from tests.feed_outcomes import counts

ROOT = Path(__file__).resolve().parent.parent
FIXTURE = ROOT / "tests" / "fixtures" / "feeds" / "three_samples.ndjson"
PROFILE = load_profile(ROOT / "profiles" / "demo_fhir.toml")
KEY = b"feed-test-key-0123456789abcdef-0123"


@pytest.fixture
def con(tmp_path: Path) -> duckdb.DuckDBPyConnection:
    store = open_store(tmp_path / "store.duckdb")
    yield store
    store.close()


def resources() -> list[dict]:
    return [json.loads(line) for line in FIXTURE.read_text(encoding="utf-8").splitlines()]


def write(tmp_path: Path, name: str, items: list[dict | str]) -> Path:
    path = tmp_path / name
    lines = [item if isinstance(item, str) else json.dumps(item) for item in items]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def load(con: duckdb.DuckDBPyConnection, path: Path, run: str = "run-1") -> FileOutcome:
    outcome = ingest_file(con, path, PROFILE, run, KEY)
    assert outcome.balanced, outcome
    return outcome


def reasons(con: duckdb.DuckDBPyConnection) -> list[str]:
    return [r[0] for r in con.execute("select reason_code from quarantine order by source_row").fetchall()]


def observation(items: list[dict], accession_spec: str, code: str) -> dict:
    return next(
        r
        for r in items
        if r["resourceType"] == "Observation"
        and r["specimen"]["reference"] == accession_spec
        and r["code"]["coding"][0]["code"] == code
    )


def test_every_fixture_resource_is_valid_for_the_r4_model():
    # FHIR R4 resource definitions, checked by the fhir.resources models (R4B, unchanged for these elements)
    for resource in resources():
        assert model_problem(resource) is None, resource["id"]


def test_the_model_rejects_a_resource_that_breaks_r4():
    # Observation.status is required, 1..1 (observation.html)
    obs = dict(observation(resources(), "Specimen/spec-1", "2744-1"))
    del obs["status"]
    assert model_problem(obs) is not None
    # a dateTime is YYYY-MM-DDThh:mm:ss+zz:zz (datatypes.html, dateTime), not a local date format
    obs["status"], obs["effectiveDateTime"] = "final", "30/11/2026 09:15"
    problem = model_problem(obs)
    assert problem is not None and "effectiveDateTime" in problem and "09:15" not in problem


def test_three_samples_load_with_values_units_and_references(con, tmp_path):
    outcome = load(con, FIXTURE)
    assert counts(outcome) == (3, 3, 0, 0, 0)
    row = con.execute(
        "select sample_id, patient_id, encounter_id, unit, analyser_id, collected_at, resulted_at, sample_type, "
        "collection_method, operator_id, o2_device, ph, pao2_mmhg, fio2, age_years, birth_date "
        "from records where sample_id = 'LAB0000101'"
    ).fetchall()[0]
    # references resolved to the Patient, Encounter and Specimen resources of the file
    assert row[:5] == ("LAB0000101", "SVH-900001", "ENC-5001", "Heron ICU", "LAB-GAS-2")
    # 09:15+01:00 is 08:15 UTC (ISO 8601 offsets; FHIR dateTime carries one)
    assert str(row[5]) == "2026-11-30 08:15:00" and str(row[6]) == "2026-11-30 08:21:00"
    assert row[7:11] == ("arterial", "arterial_line", "RN-0042", "venturi_mask")
    assert row[11] == 7.38
    # 9.80 kPa = 73.5 mmHg (1 kPa = 7.50062 mmHg, from memory); the loader's conversion
    assert row[12] == pytest.approx(73.506, abs=0.01)
    assert row[13] == pytest.approx(0.35)  # 35 % (UCUM "%") as a fraction
    assert row[14] == 67 and str(row[15]) == "1959-04-02"
    notes = con.execute("select field, comparator, result_status from record_value_notes order by sample_id").fetchall()
    # valueString "haemolysed" and valueQuantity.comparator ">" reach the notes as a CSV cell would
    assert ("k_mmol_l", None, "haemolysed") in notes and ("pao2_mmhg", ">", None) in notes


def test_a_bundle_file_is_read_like_ndjson(con, tmp_path):
    # FHIR R4 Bundle (bundle.html): entry[].resource; type "collection"
    bundle = {"resourceType": "Bundle", "type": "collection", "entry": [{"resource": r} for r in resources()]}
    path = tmp_path / "bundle.json"
    path.write_text(json.dumps(bundle, indent=2), encoding="utf-8")
    assert model_problem(bundle) is None
    assert counts(load(con, path)) == (3, 3, 0, 0, 0)


def clone(items: list[dict], number: int) -> list[dict]:
    """The first sample's Specimen and Observations again as sample ``number`` (accession
    LAB09000nn), so one file can hold one case per sample."""
    out = []
    for r in items:
        if r.get("id") == "spec-1" or (r["resourceType"] == "Observation" and r["id"].startswith("obs-1-")):
            c = json.loads(json.dumps(r).replace("spec-1", f"spec-c{number}").replace("obs-1-", f"obs-c{number}-"))
            if c["resourceType"] == "Specimen":
                c["accessionIdentifier"]["value"] = f"LAB09{number:05d}"
            out.append(c)
    return out


def find(items: list[dict], number: int, code: str) -> dict:
    return observation(items, f"Specimen/spec-c{number}", code)


def unknown_code(items: list[dict], n: int) -> list[dict]:
    find(items, n, "2708-6")["code"]["coding"][0]["code"] = "2713-6"  # not in the profile
    return items


def unknown_unit(items: list[dict], n: int) -> list[dict]:
    quantity = find(items, n, "2019-8")["valueQuantity"]
    quantity["code"] = quantity["unit"] = "psi"  # not a UCUM unit of the pressure family here
    return items


def conflict(items: list[dict], n: int) -> list[dict]:
    other = json.loads(json.dumps(find(items, n, "2744-1")))
    other["id"], other["valueQuantity"]["value"] = f"obs-c{n}-other", "7.12"  # a second final pH
    return [*items, other]


def duplicate(items: list[dict], n: int) -> list[dict]:
    return [*items, find(items, n, "2744-1")]  # the same Observation twice


def preliminary_then_final(items: list[dict], n: int) -> list[dict]:
    early = json.loads(json.dumps(find(items, n, "2744-1")))
    early["status"], early["valueQuantity"]["value"] = "preliminary", "7.30"
    return [early, *items]


def one_retracted(items: list[dict], n: int) -> list[dict]:
    retract = json.loads(json.dumps(find(items, n, "2947-0")))  # sodium, the same Observation.id
    retract["status"] = "entered-in-error"
    return [*items, retract]


def all_preliminary(items: list[dict], n: int) -> list[dict]:
    for r in items:
        if r["resourceType"] == "Observation":
            r["status"] = "preliminary"
    return items


def no_collection_time(items: list[dict], n: int) -> list[dict]:
    for r in items:
        r.pop("effectiveDateTime", None)
        if r["resourceType"] == "Specimen":
            del r["collection"]["collectedDateTime"]
    return items


def ignored_panel(items: list[dict], n: int) -> list[dict]:
    panel = json.loads(json.dumps(find(items, n, "2744-1")))
    panel["id"], panel["code"] = f"obs-c{n}-panel", {"coding": [{"system": "http://loinc.org", "code": "24336-0"}]}
    del panel["valueQuantity"]
    return [*items, panel]


# (case, edit of one cloned sample, reason it is quarantined with or None when it loads)
CASES = [
    (unknown_code, "UNKNOWN_OBSERVATION_CODE"),
    (unknown_unit, "UNIT_UNKNOWN"),
    (conflict, "CONFLICTING_VALUES"),
    (duplicate, None),
    (preliminary_then_final, None),
    (one_retracted, None),
    (all_preliminary, "PRELIMINARY_RESULT"),
    (no_collection_time, "MISSING_REQUIRED"),  # the loader's own reason for an empty required field
    (ignored_panel, None),
]


def test_each_fault_in_one_file_reaches_its_own_outcome(con, tmp_path):
    base = resources()
    items: list[dict | str] = list(base)
    for n, (edit, _reason) in enumerate(CASES, start=1):
        items += edit(clone(base, n), n)
    # a line cut off mid-object (JSON_INVALID) and an Observation without its specimen (ACCESSION_MISSING)
    items.insert(5, '{"resourceType": "Observation", "status": "final", "code": ')
    orphan = json.loads(json.dumps(observation(base, "Specimen/spec-2", "2947-0")))
    orphan["id"] = "orphan"
    del orphan["specimen"]
    items.append(orphan)
    outcome = load(con, write(tmp_path, "cases.ndjson", items))

    quarantined = [reason for _edit, reason in CASES if reason]
    loaded = 3 + len(CASES) - len(quarantined)
    assert counts(outcome) == (3 + len(CASES) + 2, loaded, len(quarantined) + 2, 0, 0)
    rows = con.execute("select reason_code, coalesce(record_id, ''), original_text from quarantine").fetchall()
    for n, (edit, reason) in enumerate(CASES, start=1):
        accession = f"LAB09{n:05d}"
        held = con.execute("select count(*) from records where sample_id = ?", [accession]).fetchall()[0][0]
        mine = [r[0] for r in rows if accession in r[1] or accession in (r[2] or "")]
        assert (held, mine) == ((0, [reason]) if reason else (1, [])), edit.__name__
    # a quarantined line keeps where it was, what is wrong and its text (JSON-quoted in original_text)
    lines = [(r[0], json.loads(r[2])) for r in rows if r[1] == ""]
    assert [reason for reason, text in lines if text.startswith("line 6:")] == ["JSON_INVALID"]
    assert [reason for reason, text in lines if '"id": "orphan"' in text] == ["ACCESSION_MISSING"]
    # what the grouping decided for the cases that loaded
    ph = dict(con.execute("select sample_id, ph from records").fetchall())
    assert ph["LAB0900005"] == 7.38  # the final pH stands over the preliminary 7.30
    assert con.execute("select na_mmol_l from records where sample_id = 'LAB0900006'").fetchall() == [(None,)]
    notes = " | ".join(outcome.notes)
    for note in (
        "duplicate observations merged: 1",
        "replaced by a later or final version: 1",
        "entered in error or cancelled: 1",
        "ignored codes: 1",
    ):
        assert note in notes


def test_the_conflict_message_names_the_field_not_the_values(con, tmp_path):
    base = resources()
    outcome = load(con, write(tmp_path, "conflict.ndjson", [*base, *conflict(clone(base, 1), 1)]))
    assert counts(outcome) == (4, 3, 1, 0, 0)
    text = con.execute("select original_text from quarantine").fetchall()[0][0]
    assert "ph" in text and "7.12" not in text


def test_preliminary_results_are_held_back_until_final(con, tmp_path):
    items = resources()
    for r in items:
        if r["resourceType"] == "Observation" and r["specimen"]["reference"] == "Specimen/spec-3":
            r["status"] = "preliminary"
    first = load(con, write(tmp_path, "day1.ndjson", items))
    assert counts(first) == (3, 2, 1, 0, 0)
    assert reasons(con) == ["PRELIMINARY_RESULT"]
    # the final results arrive the next day: the record loads (it was never in records)
    final = [r for r in resources() if r.get("resourceType") != "Observation" or r["id"].startswith("obs-3-")]
    second = load(con, write(tmp_path, "day2.ndjson", final), run="run-2")
    assert counts(second) == (1, 1, 0, 0, 0) and second.corrections == 0
    assert con.execute("select count(*) from records").fetchall()[0][0] == 3


def test_a_file_not_in_utf8_is_rejected(con, tmp_path):
    path = tmp_path / "latin1.ndjson"
    path.write_bytes(FIXTURE.read_text(encoding="utf-8").replace("Heron ICU", "Héron ICU").encode("latin-1"))
    outcome = ingest_file(con, path, PROFILE, "run-1", KEY)
    assert (outcome.outcome, outcome.reason_code) == ("rejected", "ENCODING_INVALID")
    assert outcome.balanced and "line 2" in (outcome.message or "")


def test_a_corrected_result_in_a_later_file_is_a_correction(con, tmp_path):
    load(con, FIXTURE)
    corrected = resources()
    obs = observation(corrected, "Specimen/spec-1", "2744-1")
    obs["status"], obs["valueQuantity"]["value"] = "corrected", 7.28
    outcome = load(con, write(tmp_path, "corrected.ndjson", corrected), run="run-2")
    # the two unchanged records are duplicates of what the store holds; one correction
    assert counts(outcome) == (3, 1, 0, 2, 0) and outcome.corrections == 1
    assert con.execute("select ph from records where sample_id = 'LAB0000101'").fetchall()[0][0] == 7.28
    assert con.execute("select ph from superseded_records where sample_id = 'LAB0000101'").fetchall() == [(7.38,)]


def test_entered_in_error_removes_nothing_silently(con, tmp_path):
    load(con, FIXTURE)
    withdrawn = [r for r in resources() if r.get("resourceType") != "Observation" or r["id"].startswith("obs-2-")]
    for r in withdrawn:
        if r["resourceType"] == "Observation":
            r["status"] = "entered-in-error"
    outcome = load(con, write(tmp_path, "withdrawn.ndjson", withdrawn), run="run-2")
    assert counts(outcome) == (1, 0, 1, 0, 0)
    assert reasons(con) == ["RESULT_WITHDRAWN"]
    # the record loaded before stays; the withdrawal is on record in quarantine, with the accession
    assert con.execute("select count(*) from records where sample_id = 'LAB0000102'").fetchall()[0][0] == 1
    assert "LAB0000102" in con.execute("select original_text from quarantine").fetchall()[0][0]


def test_records_grouped_by_an_identifier_the_profile_names(con, tmp_path):
    # Observation.identifier (observation.html): the laboratory's accession with its own system
    system = "https://saltmarsh-valley.example/accession"
    text = (
        (ROOT / "profiles" / "demo_fhir.toml")
        .read_text(encoding="utf-8")
        .replace(
            'ignored_codes = ["24336-0"]',
            f'ignored_codes = ["24336-0"]\ngroup_by = "identifier"\naccession_system = "{system}"',
        )
    )
    (tmp_path / "by_identifier.toml").write_text(text, encoding="utf-8")
    profile = load_profile(tmp_path / "by_identifier.toml")
    items = [r for r in resources() if r["resourceType"] != "Specimen"]  # no Specimen resources at all
    for r in items:
        if r["resourceType"] == "Observation":
            number = r["specimen"]["reference"].removeprefix("Specimen/spec-")
            r["identifier"] = [{"system": system, "value": f"ACC-{number}"}]
            del r["specimen"]
    outcome = ingest_file(con, write(tmp_path, "by_identifier.ndjson", items), profile, "run-1", KEY)
    assert outcome.balanced and counts(outcome) == (3, 3, 0, 0, 0)
    ids = [r[0] for r in con.execute("select sample_id from records order by sample_id").fetchall()]
    assert ids == ["ACC-1", "ACC-2", "ACC-3"]


def test_the_same_file_again_loads_nothing(con, tmp_path):
    load(con, FIXTURE)
    again = ingest_file(con, FIXTURE, PROFILE, "run-2", KEY)
    assert again.outcome == "already_loaded"


def test_a_profile_with_a_wrong_check_digit_is_refused(tmp_path):
    text = (ROOT / "profiles" / "demo_fhir.toml").read_text(encoding="utf-8").replace('"2744-1"', '"2744-2"', 1)
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError, match="2744-2"):
        load_profile(path)
