"""The canonical record, the store DDL, the docs and the command line stay in step."""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from pipeline.cli import main
from pipeline.schema import FIELDS, PRESCRIPTION_FIELDS, Kind
from pipeline.store import open_store

ROOT = Path(__file__).resolve().parent.parent
DUCKDB_TYPES = {
    Kind.TEXT: "VARCHAR",
    Kind.CODE: "VARCHAR",
    Kind.NUMBER: "DOUBLE",
    Kind.TIMESTAMP: "TIMESTAMP",
    Kind.DATE: "DATE",
    Kind.BOOLEAN: "BOOLEAN",
}


def test_records_table_has_every_canonical_field_with_its_type(tmp_path):
    con = open_store(tmp_path / "s.duckdb")
    columns = dict(con.execute("select column_name, data_type from information_schema.columns "
                               "where table_name = 'records'").fetchall())
    for field in FIELDS:
        assert columns.get(field.name) == DUCKDB_TYPES[field.kind], field.name


def test_canonical_names_are_unique_ignoring_case():
    # great-expectations matches column names case-insensitively (tech notes section 1.2).
    names = [f.name for f in FIELDS]
    assert len({n.casefold() for n in names}) == len(names)


def test_canonical_record_doc_lists_every_field():
    text = (ROOT / "docs" / "canonical-record.md").read_text(encoding="utf-8")
    for field in FIELDS:
        assert f"`{field.name}`" in text, field.name


@pytest.mark.parametrize("command", sorted(main.commands))
def test_every_command_has_help_and_is_in_the_readme(command):
    result = CliRunner().invoke(main, [command, "--help"])
    assert result.exit_code == 0 and "Usage:" in result.output
    assert len(main.commands[command].help or "") > 20
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert f"abg-audit {command}" in readme, command


def test_readme_states_the_caution_and_two_setup_commands():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert "not a diagnostic device" in readme
    assert readme.count("python3 -m venv .venv && .venv/bin/pip install") == 2
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert ".venv/bin/python -m pytest -n 2 -q" in readme and ".venv/bin/python -m pytest -n 2 -q" in ci


def test_prescriptions_table_has_every_prescription_field_with_its_type(tmp_path):
    con = open_store(tmp_path / "s.duckdb")
    for table in ("prescriptions", "superseded_prescriptions"):
        columns = dict(con.execute("select column_name, data_type from information_schema.columns "
                                   "where table_name = ?", [table]).fetchall())
        for field in PRESCRIPTION_FIELDS:
            assert columns.get(field.name) == DUCKDB_TYPES[field.kind], (table, field.name)
        for pseudonym in ("patient_key", "encounter_key"):
            assert columns.get(pseudonym) == "VARCHAR"


def test_fields_shared_by_samples_and_prescriptions_have_one_definition():
    # Hard limits are per field name (the store's field_limits, built from FIELDS): a field a
    # prescription shares with a sample must have the sample's kind, unit family and limits.
    samples = {f.name: f for f in FIELDS}
    for field in PRESCRIPTION_FIELDS:
        if field.name in samples:
            shared = samples[field.name]
            assert (field.kind, field.unit_family, field.hard_min, field.hard_max) == (
                shared.kind,
                shared.unit_family,
                shared.hard_min,
                shared.hard_max,
            ), field.name
        else:
            assert field.hard_min is None and field.hard_max is None, field.name


def test_canonical_record_doc_lists_every_prescription_field_and_reason():
    text = (ROOT / "docs" / "canonical-record.md").read_text(encoding="utf-8")
    section = text.split("## Prescriptions feed", 1)[1]
    for field in PRESCRIPTION_FIELDS:
        assert f"`{field.name}`" in section, field.name
    for reason in ("TARGET_RANGE_INVALID", "END_BEFORE_START"):
        assert f"`{reason}`" in section


def test_fields_command_lists_both_record_kinds():
    output = CliRunner().invoke(main, ["fields"]).output
    samples, prescriptions = output.split("# prescriptions", 1)
    for field in FIELDS:
        assert f"\n{field.name} " in samples, field.name
    for field in PRESCRIPTION_FIELDS:
        assert f"\n{field.name} " in prescriptions, field.name
