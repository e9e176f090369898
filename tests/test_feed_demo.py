"""The demo's FHIR and HL7 v2 feeds deliver the same records as the CSV and Parquet exports the
same samples would have been written to: the faults that live in the export (duplicates,
corrections, text results) and those in the values reach ``records`` the same way.

One small demo (the generator's own faults at raised rates) is written twice, with and without
the feeds (``write_exports(feeds=...)``), each source as one file, and loaded into two stores.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from pipeline.ingest.load import ingest_file
from pipeline.profile import load_profile
from pipeline.store import open_store
from synthetic_data import generate_demo, scale_fault_rates
from synthetic_data.feed_writers import FEED_ANALYSERS
from synthetic_data.writers import PROFILES_DIR, write_exports

KEY = b"feed-test-key-0123456789abcdef-0123"
PROFILES = {
    "us_style": "demo_us_style.toml",
    "parquet": "demo_parquet.toml",
    "fhir": "demo_fhir.toml",
    "hl7v2": "demo_hl7v2.toml",
}
PROVENANCE = ["source_file", "source_row", "file_sha256", "run_id"]


def load_all(folder: Path, written: dict[str, list[Path]], db: Path) -> pl.DataFrame:
    con = open_store(db)
    try:
        for source, paths in written.items():
            if source not in PROFILES:
                continue
            profile = load_profile(PROFILES_DIR / PROFILES[source])
            for path in paths:
                outcome = ingest_file(con, path, profile, "run-1", KEY)
                assert outcome.outcome == "loaded" and outcome.balanced, outcome
        return con.sql("select * from records order by sample_id").pl().drop(PROVENANCE)
    finally:
        con.close()


def test_feed_samples_store_the_records_their_csv_and_parquet_exports_store(tmp_path):
    data = generate_demo(1_200, 11, days=20, fault_rates=scale_fault_rates(0.3))
    plain = write_exports(data.records, data.faults, tmp_path / "plain", single_file=True)
    feeds = write_exports(data.records, data.faults, tmp_path / "feeds", single_file=True, feeds=True)
    assert set(feeds) >= {"fhir", "hl7v2"}

    expected = load_all(tmp_path / "plain", plain, tmp_path / "plain.duckdb")
    stored = load_all(tmp_path / "feeds", feeds, tmp_path / "feeds.duckdb")
    on_feeds = data.records.filter(pl.col("analyser_id").is_in(list(FEED_ANALYSERS))).get_column("sample_id")
    # the feeds carry samples of both analysers, with export faults among them
    faulted = data.faults.filter(pl.col("sample_id").is_in(on_feeds.implode()))
    assert on_feeds.len() > 100 and faulted.height > 10
    # every record of the laboratory and ward satellite sources, the feeds' samples among them
    same_sources = pl.col("sample_id").str.contains("^(LAB|WH)")
    assert expected.filter(same_sources).height > on_feeds.len()
    assert stored.filter(same_sources).equals(expected.filter(same_sources))
