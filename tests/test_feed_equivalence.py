"""The same three samples delivered as CSV, Parquet, FHIR R4 NDJSON and HL7 v2 give the
same ``records`` rows: the feeds only change how the cells reach the loader.

The fixtures (tests/fixtures/feeds/three_samples.*) hold the same invented samples: the CSV
in UTC with canonical codes, the FHIR file with +01:00 offsets and HL7 table 0487 specimen
types, the HL7 v2 file with -06:00 offsets and the laboratory's codes (see the FHIR and HL7
test modules for the sections of the standards they follow). Values, units (kPa, %, Celsius,
g/dL), a qualified value and a text result are the same in all four.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from pipeline.ingest.load import ingest_file
from pipeline.profile import load_profile
from pipeline.store import open_store

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "tests" / "fixtures" / "feeds"
KEY = b"feed-test-key-0123456789abcdef-0123"
# Where a record came from differs by delivery; everything else must not.
PROVENANCE = ("source_file", "source_row", "file_sha256", "run_id")


def parquet_delivery(tmp_path: Path) -> tuple[Path, Path]:
    frame = pl.read_csv(FIXTURES / "three_samples.csv")  # typed columns where polars can type them
    path = tmp_path / "three_samples.parquet"
    frame.write_parquet(path)
    text = (FIXTURES / "three_samples_csv.toml").read_text(encoding="utf-8")
    profile = tmp_path / "three_samples_parquet.toml"
    profile.write_text(text.replace('format = "csv"', 'format = "parquet"'), encoding="utf-8")
    return path, profile


def stored(tmp_path: Path, name: str, export: Path, profile: Path) -> pl.DataFrame:
    con = open_store(tmp_path / f"{name}.duckdb")
    try:
        outcome = ingest_file(con, export, load_profile(profile), "run-1", KEY)
        assert (outcome.outcome, outcome.rows_in, outcome.rows_loaded) == ("loaded", 3, 3), outcome
        records = con.sql("select * from records order by sample_id").pl()
        notes = con.sql("select * exclude (file_sha256) from record_value_notes order by sample_id, field").pl()
    finally:
        con.close()
    keep = [c for c in records.columns if c not in PROVENANCE]
    return records.select(keep), notes


def test_four_deliveries_of_the_same_samples_store_the_same_records(tmp_path):
    parquet, parquet_profile = parquet_delivery(tmp_path)
    deliveries = {
        "csv": (FIXTURES / "three_samples.csv", FIXTURES / "three_samples_csv.toml"),
        "parquet": (parquet, parquet_profile),
        "fhir": (FIXTURES / "three_samples.ndjson", ROOT / "profiles" / "demo_fhir.toml"),
        "hl7v2": (FIXTURES / "three_samples.hl7", ROOT / "profiles" / "demo_hl7v2.toml"),
    }
    results = {name: stored(tmp_path, name, *paths) for name, paths in deliveries.items()}
    reference, reference_notes = results["csv"]
    assert reference.height == 3
    # content_hash (over every canonical value) is among the compared columns: a second check
    assert reference.get_column("content_hash").n_unique() == 3
    for name, (records, notes) in results.items():
        assert records.columns == reference.columns, name
        assert records.equals(reference), name
        assert notes.equals(reference_notes), name


@pytest.mark.parametrize("name", ["demo_fhir", "demo_hl7v2"])
def test_feed_profiles_map_every_field_the_fixtures_send(name):
    profile = load_profile(ROOT / "profiles" / f"{name}.toml")
    assert profile.feed is not None
    csv_fields = set(load_profile(FIXTURES / "three_samples_csv.toml").columns)
    assert csv_fields <= set(profile.columns), csv_fields - set(profile.columns)
