"""The network lake: what ``abg-audit publish-lake`` writes, that it is atomic, and that no raw
identifier leaves the site. The site is an invented one (the demo generator), its store a real
store file made by ``pipeline.store.open_store``."""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import polars as pl
import pytest
from click.testing import CliRunner

from pipeline.cli import main
from pipeline.errors import ConfigError, StorageError
from pipeline.network import lake as lake_module
from pipeline.network.demo_lake import demo_key, demo_unit_targets, store_demo_site
from pipeline.network.lake import (
    LAKE_TABLES,
    SiteSettings,
    check_site_id,
    publish_lake,
    read_manifests,
    site_id,
    verify_checksums,
)
from pipeline.store import open_store
from synthetic_data import generate_demo
from tests.nightly_site import keep_umask  # noqa: F401 - fixture

KEY = demo_key("invented-test-site")
PROFILES = Path(__file__).resolve().parent.parent / "profiles"
SITE = "invented-test-site"
IDENTIFIER_COLUMNS = ("sample_id", "patient_id", "encounter_id", "operator_id")


@pytest.fixture(scope="module")
def demo():
    return generate_demo(600, 23)


@pytest.fixture
def store(tmp_path: Path, demo) -> Path:
    path = tmp_path / "site" / "store" / "abg_audit.duckdb"
    con = open_store(path)
    try:
        store_demo_site(con, demo, KEY, SITE)
    finally:
        con.close()
    return path


def settings() -> SiteSettings:
    return SiteSettings(SITE, "Invented test site", None, 35.0, demo_unit_targets())


def publish(store: Path, lake: Path) -> dict:
    con = open_store(store, read_only=True)
    try:
        return publish_lake(con, settings(), KEY, lake)
    finally:
        con.close()


def lake_files(lake: Path) -> list[Path]:
    return sorted(p for p in lake.rglob("*") if p.is_file())


def test_layout_and_manifest_counts_equal_the_store(store: Path, tmp_path: Path) -> None:
    # common practice: a manifest's counts are checked against the source before a consumer trusts it
    lake = tmp_path / "lake"
    manifest = publish(store, lake)
    con = duckdb.connect(str(store), read_only=True)
    try:
        for table in LAKE_TABLES:
            stored = con.execute(f"select count(*) from {table}").fetchall()[0][0]
            assert manifest["tables"][table]["rows"] == stored
            listed = [f for f in manifest["files"] if f["table"] == table]
            assert sum(f["rows"] for f in listed) == stored
            read_back = sum(pl.read_parquet(lake / f["path"]).height for f in listed)
            assert read_back == stored
        months = con.execute("select count(distinct strftime(collected_at, '%Y-%m')) from records").fetchall()[0][0]
    finally:
        con.close()
    record_files = [f for f in manifest["files"] if f["table"] == "records"]
    assert len(record_files) == months
    for entry in record_files:
        path = Path(entry["path"])
        assert path.parts[:3] == ("records", f"site={SITE}", f"month={entry['month']}")
    assert manifest["schema_version"] == lake_module.LAKE_SCHEMA_VERSION
    assert manifest["site"] == SITE and manifest["written_at"].endswith("Z")
    assert read_manifests(lake)[0] == json.loads((lake / "manifests" / f"{SITE}.json").read_text())
    verify_checksums(lake, manifest)  # sha256 of every file as listed


def test_no_raw_identifier_in_any_lake_file(store: Path, tmp_path: Path, demo) -> None:
    # the product rule "no raw identifier leaves the site": search the bytes of every file and the
    # decoded text of every column (Parquet pages are compressed, so bytes alone could miss one)
    lake = tmp_path / "lake"
    publish(store, lake)
    raw: set[str] = set()
    for column in IDENTIFIER_COLUMNS:
        raw |= set(demo.records.get_column(column).drop_nulls().to_list())
    raw |= set(demo.prescriptions.get_column("prescription_id").drop_nulls().to_list())
    assert len(raw) > 500
    files = lake_files(lake)
    assert files
    for path in files:
        data = path.read_bytes()
        for ident in raw:
            assert ident.encode() not in data, f"{path.name} holds a raw identifier"
    for path in (p for p in files if p.suffix == ".parquet"):
        frame = pl.read_parquet(path)
        assert not set(IDENTIFIER_COLUMNS[1:]) & set(frame.columns)
        assert "source_file" not in frame.columns
        for column, dtype in frame.schema.items():
            if dtype == pl.String:
                values = set(frame.get_column(column).drop_nulls().to_list())
                assert not values & raw, f"{path.name} column {column} holds raw identifiers"


def test_sample_numbers_leave_as_keyed_pseudonyms(store: Path, tmp_path: Path, demo) -> None:
    # RFC 2104 HMAC: the same key and message give the same pseudonym, so the site can map back
    from pipeline.pseudonym import pseudonym

    lake = tmp_path / "lake"
    publish(store, lake)
    published = pl.concat([pl.read_parquet(p) for p in (lake / "records").rglob("*.parquet")])
    expected = {pseudonym(KEY, s, "lake sample") for s in demo.records.get_column("sample_id").to_list()}
    assert set(published.get_column("sample_id").to_list()) == expected


def test_a_failure_midway_leaves_no_partial_partition(store: Path, tmp_path: Path, monkeypatch) -> None:
    # common practice (atomic publication): write aside, rename into place; a reader sees whole
    # partitions and only what a manifest lists
    lake = tmp_path / "lake"
    first = publish(store, lake)
    before = {p: p.read_bytes() for p in lake_files(lake)}
    real = lake_module.write_parquet
    calls = {"n": 0}

    def failing(frame: pl.DataFrame, path: Path) -> None:
        calls["n"] += 1
        if calls["n"] == 2:
            real(frame.head(3), path)  # a partial file, then the failure
            raise OSError(28, "No space left on device")
        real(frame, path)

    monkeypatch.setattr(lake_module, "write_parquet", failing)
    with pytest.raises(OSError):
        publish(store, lake)
    # the manifest is the first publication's; every file it lists is there, whole, and nothing else
    assert read_manifests(lake)[0]["publish_id"] == first["publish_id"]
    verify_checksums(lake, first)
    assert {p: p.read_bytes() for p in lake_files(lake)} == before
    assert not list((lake / ".staging").glob("*")), "staging files left behind"
    # and the next publication replaces it whole
    monkeypatch.setattr(lake_module, "write_parquet", real)
    second = publish(store, lake)
    assert second["publish_id"] != first["publish_id"]
    listed = {second_entry["path"] for second_entry in second["files"]}
    assert {p.relative_to(lake).as_posix() for p in lake.rglob("*.parquet")} == listed


def test_a_failed_first_publication_leaves_no_manifest(store: Path, tmp_path: Path, monkeypatch) -> None:
    lake = tmp_path / "lake"

    def failing(frame: pl.DataFrame, path: Path) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(lake_module, "write_parquet", failing)
    with pytest.raises(OSError):
        publish(store, lake)
    assert not (lake / "manifests").exists()
    assert not [p for p in lake.rglob("*.parquet")]
    with pytest.raises(ConfigError, match="no site manifests"):
        read_manifests(lake)


def test_a_changed_file_is_refused(store: Path, tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    manifest = publish(store, lake)
    target = lake / manifest["files"][0]["path"]
    target.write_bytes(target.read_bytes() + b"\0")
    with pytest.raises(StorageError, match="differs from its manifest"):
        verify_checksums(lake, manifest)


def test_site_ids() -> None:
    assert site_id("Saltmarsh Valley Hospital (invented)") == "saltmarsh-valley-hospital-invented"
    with pytest.raises(ConfigError, match="lake folder name"):
        check_site_id("../elsewhere")


def test_publish_lake_command(store: Path, tmp_path: Path) -> None:
    site = store.parent.parent
    key_file = site / "secrets" / "pseudonym.key"
    key_file.parent.mkdir(mode=0o700)
    key_file.write_bytes(KEY)
    key_file.chmod(0o600)
    config = site / "site.toml"
    config.write_text(
        '[site]\nname = "Invented test site"\naltitude_m = 35\n\n[store]\npath = "store/abg_audit.duckdb"\n\n'
        '[output]\nfolder = "output"\n\n[privacy]\nkey_file = "secrets/pseudonym.key"\n\n'
        f'[[inputs]]\npath = "exports"\nprofile = "{PROFILES / "demo_us_style.toml"}"\npattern = "*.csv"\n',
        encoding="utf-8",
    )
    lake = tmp_path / "lake"
    result = CliRunner().invoke(main, ["publish-lake", "--config", str(config), "--to", str(lake)])
    assert result.exit_code == 0, result.output
    assert "site invented-test-site:" in result.output
    manifest = read_manifests(lake)[0]
    assert manifest["settings"]["altitude_m"] == 35
    bad = CliRunner().invoke(main, ["publish-lake", "--config", str(config), "--to", str(lake), "--site-id", "A B"])
    assert bad.exit_code == 78 and "lake folder name" in bad.output
