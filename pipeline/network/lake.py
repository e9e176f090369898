"""The network lake: each site's pseudonymised canonical records as Parquet, by site and month.

``abg-audit publish-lake`` writes, for one site, every table of ``LAKE_TABLES`` partitioned as
``<lake>/<table>/site=<site>/month=<YYYY-MM>/part-<publish id>.parquet`` and then the site's
manifest ``<lake>/manifests/<site>.json`` (files, row counts, sha256, schema version, the site's
settings the network run needs). Raw identifiers never leave the site: the identifier columns
(``pipeline.schema.PSEUDONYMISED``) and the source file path are dropped, and the sample and
prescription numbers (accession and order numbers, which the laboratory can trace to a patient)
are replaced by keyed pseudonyms of their own domains, made with the site's key.

Atomicity: every partition file is written into a staging folder inside the lake and renamed into
its partition (a rename within one file system is atomic), under a name of its own publication
(``part-<publish id>``); the manifest is replaced (rename) once every file is in place, and only
then are the previous publication's files removed. Readers take the files a manifest lists, so
they see the previous publication or the new one, each whole, never a mix; a publication that
fails midway removes what it wrote and leaves the previous manifest and files as they were.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from pipeline.config import SiteConfig
from pipeline.errors import ConfigError, StorageError
from pipeline.pseudonym import add_pseudonym
from pipeline.schema import PSEUDONYMISED

LAKE_SCHEMA_VERSION = 1
# table -> the time column that gives a row its month partition.
LAKE_TABLES: dict[str, str] = {
    "records": "collected_at",
    "superseded_records": "collected_at",
    "prescriptions": "start_at",
}
# Record numbers that are not patient identifiers but can be traced to one by the site's
# laboratory: replaced by keyed pseudonyms, each in its own domain (pipeline/pseudonym.py).
LAKE_PSEUDONYMS: dict[str, str] = {"sample_id": "lake sample", "prescription_id": "lake prescription"}
# Dropped: the raw identifiers and the export's file path (folder names can name people).
DROPPED_COLUMNS = (*PSEUDONYMISED, "source_file")
NO_MONTH = "unknown"
_SITE_PATTERN = re.compile(r"^[a-z0-9][a-z0-9_-]{0,62}$")


@dataclass(frozen=True)
class SiteSettings:
    """What the network run needs to know of a site to compute what the site computes."""

    site: str
    site_name: str
    barometric_pressure_mmhg: float | None
    altitude_m: float | None
    unit_targets: list[tuple[str, str, float | None, float | None, bool]]

    @staticmethod
    def of(config: SiteConfig, site: str) -> SiteSettings:
        return SiteSettings(
            site=site,
            site_name=config.site_name,
            barometric_pressure_mmhg=config.barometric_pressure_mmhg,
            altitude_m=config.altitude_m,
            unit_targets=config.unit_target_rows(),
        )

    def as_json(self) -> dict[str, Any]:
        return {
            "site_name": self.site_name,
            "barometric_pressure_mmhg": self.barometric_pressure_mmhg,
            "altitude_m": self.altitude_m,
            "unit_targets": [list(row) for row in self.unit_targets],
        }


def site_id(name: str) -> str:
    """A site's folder name in the lake: lower case letters, digits, '-' and '_' (checked)."""
    slug = re.sub(r"[^a-z0-9_-]+", "-", name.lower()).strip("-")[:63]
    return check_site_id(slug)


def check_site_id(value: str) -> str:
    if not _SITE_PATTERN.match(value):
        raise ConfigError(
            f"site id {value!r} is not usable as a lake folder name: use 1-63 lower-case letters, digits, '-' or '_'"
        )
    return value


def publish_lake(con: duckdb.DuckDBPyConnection, settings: SiteSettings, key: bytes, lake: Path) -> dict[str, Any]:
    """Write the site's tables into ``lake`` (one atomic rename per partition), then its manifest.

    Partitions of the site written before and absent now are removed after the manifest no longer
    lists them. Returns the manifest."""
    lake.mkdir(parents=True, exist_ok=True)
    publish_id = uuid.uuid4().hex[:12]
    files: list[dict[str, Any]] = []
    store_rows: dict[str, int] = {}
    try:
        for table, time_column in LAKE_TABLES.items():
            if not _has_table(con, table):
                continue
            store_rows[table] = con.execute(f"select count(*) from {table}").fetchall()[0][0]
            for month, frame in _months(con, table, time_column):
                frame = _pseudonymised(frame, key)
                files.append(_write_partition(lake, table, settings.site, month, publish_id, frame))
        for table, rows in store_rows.items():
            written = sum(f["rows"] for f in files if f["table"] == table)
            if written != rows:  # a row lost between the store and the lake must stop the publication
                raise StorageError(f"lake {table} of site {settings.site}: {written} rows written, {rows} in the store")
        manifest = {
            "schema_version": LAKE_SCHEMA_VERSION,
            "site": settings.site,
            "publish_id": publish_id,
            "written_at": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "settings": settings.as_json(),
            "tables": {table: {"rows": rows} for table, rows in store_rows.items()},
            "files": files,
        }
        _replace_json(lake / "manifests" / f"{settings.site}.json", manifest)
    except BaseException:
        for entry in files:  # this publication's files: the previous manifest never listed them
            (lake / entry["path"]).unlink(missing_ok=True)
        raise
    _remove_unlisted(lake, settings.site, {f["path"] for f in files})
    return manifest


def _has_table(con: duckdb.DuckDBPyConnection, table: str) -> bool:
    query = "select count(*) from information_schema.tables where table_name = ?"
    return con.execute(query, [table]).fetchall()[0][0] > 0


def _months(con: duckdb.DuckDBPyConnection, table: str, time_column: str) -> Iterator[tuple[str, pl.DataFrame]]:
    """The table's rows one month at a time (bounded memory), raw identifiers left out."""
    columns = [r[0] for r in con.execute(f"select * from {table} limit 0").description]
    kept = ", ".join(f'"{c}"' for c in columns if c not in DROPPED_COLUMNS)
    month = f"coalesce(strftime({time_column}, '%Y-%m'), '{NO_MONTH}')"
    values = [r[0] for r in con.execute(f"select distinct {month} from {table} order by 1").fetchall()]
    if not values:  # an empty table still publishes its columns (a zero-row file), so readers know them
        yield NO_MONTH, con.sql(f"select {kept} from {table} limit 0").pl()
    for value in values:
        query = f"select {kept} from {table} where {month} = '{value}' order by rowid"
        yield value, con.sql(query).pl()


def _pseudonymised(frame: pl.DataFrame, key: bytes) -> pl.DataFrame:
    for column, domain in LAKE_PSEUDONYMS.items():
        if column in frame.columns:
            frame = add_pseudonym(frame, key, column, column, domain)
    return frame


def partition_folder(lake: Path, table: str, site: str, month: str) -> Path:
    return lake / table / f"site={site}" / f"month={month}"


def _write_partition(lake: Path, table: str, site: str, month: str, publish_id: str, frame: pl.DataFrame) -> dict:
    """Write one partition file in the staging folder and rename it into its partition."""
    staging = lake / ".staging"
    staging.mkdir(exist_ok=True)
    name = f"part-{publish_id}.parquet"
    staged = staging / f"{publish_id}-{table}-{month}.parquet"
    try:
        write_parquet(frame, staged)
        digest = hashlib.sha256(staged.read_bytes()).hexdigest()
        final = partition_folder(lake, table, site, month)
        final.mkdir(parents=True, exist_ok=True)
        os.rename(staged, final / name)
    finally:
        staged.unlink(missing_ok=True)
    return {
        "table": table,
        "month": month,
        "path": (final / name).relative_to(lake).as_posix(),
        "rows": frame.height,
        "sha256": digest,
    }


def write_parquet(frame: pl.DataFrame, path: Path) -> None:
    """One Parquet file (zstd); a separate function so tests can make it fail midway."""
    frame.write_parquet(path, compression="zstd")


def _replace_json(path: Path, content: dict[str, Any]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}")
    temporary.write_text(json.dumps(content, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    os.replace(temporary, path)


def _remove_unlisted(lake: Path, site: str, listed: set[str]) -> None:
    """Files of this site's partitions that the manifest no longer lists (an earlier publication's),
    and partitions left empty."""
    for table in LAKE_TABLES:
        folder = lake / table / f"site={site}"
        for partition in sorted(folder.glob("month=*")) if folder.exists() else []:
            for file in partition.iterdir():
                if file.relative_to(lake).as_posix() not in listed:
                    file.unlink()
            if not any(partition.iterdir()):
                partition.rmdir()


def read_manifests(lake: Path) -> list[dict[str, Any]]:
    """Every site's manifest in the lake, each checked: the files it lists exist with their sha256."""
    folder = lake / "manifests"
    manifests = []
    for path in sorted(folder.glob("*.json")) if folder.exists() else []:
        manifest = json.loads(path.read_text(encoding="utf-8"))
        if manifest.get("schema_version") != LAKE_SCHEMA_VERSION:
            raise ConfigError(
                f"{path}: lake schema version {manifest.get('schema_version')}, this release reads "
                f"{LAKE_SCHEMA_VERSION}; publish the site again"
            )
        for entry in manifest["files"]:
            file = lake / entry["path"]
            if not file.exists():
                raise StorageError(f"{path}: lists {entry['path']}, which is missing; publish the site again")
        manifests.append(manifest)
    if not manifests:
        raise ConfigError(f"{lake}: no site manifests in {folder}; run abg-audit publish-lake first")
    return manifests


def verify_checksums(lake: Path, manifest: dict[str, Any]) -> None:
    """Each listed file's sha256 against the manifest (a file changed after publication is refused)."""
    for entry in manifest["files"]:
        digest = hashlib.sha256((lake / entry["path"]).read_bytes()).hexdigest()
        if digest != entry["sha256"]:
            raise StorageError(f"lake file {entry['path']} differs from its manifest (sha256); publish the site again")
