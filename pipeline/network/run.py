"""``abg-audit network``: the derive, rules and audit stages over a lake of many sites, on DuckDB or Spark.

The outputs are the site's own stage tables (``stages.STAGE_OUTPUTS``) with a ``site`` column,
written as Parquet partitioned by site under the output folder; each site's published audit
tables and report, the published tables of every site with a ``site`` column, and one network
report under ``published/`` (``pipeline/network/publish.py``); and ``network_run.json`` (engine,
sites, rows, seconds per stage). The settings are the catalogue's thresholds and the default
audit settings, or a network's own settings file (``[thresholds]``, ``[audit]``, ``[privacy]
small_cell_threshold``), the same for every site so that sites are compared like with like.
"""

from __future__ import annotations

import json
import shutil
import tempfile
import time
import tomllib
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import polars as pl

from pipeline.audit_settings import AuditSettings, parse_audit_settings
from pipeline.errors import ConfigError
from pipeline.log import Log
from pipeline.network.engines import DuckDBEngine, SparkEngine, read_lake, spark_session
from pipeline.network.lake import read_manifests, verify_checksums
from pipeline.network.publish import NetworkSettings, publish_network
from pipeline.network.stages import STAGE_OUTPUTS, stage_statements
from pipeline.rules import catalogue_frame, load_catalogue

ENGINES = ("duckdb", "spark")


@dataclass
class NetworkResult:
    engine: str
    sites: list[str]
    rows: dict[str, int] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)
    untranslated: list[str] = field(default_factory=list)


def load_settings(path: Path | None) -> NetworkSettings:
    """The network's settings file: ``[thresholds]`` as in a site configuration, ``[audit]`` as in a
    site configuration, and ``[privacy] small_cell_threshold``; every part optional."""
    if path is None:
        return NetworkSettings()
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"{path}: settings file not found") from None
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"{path}: not valid TOML ({err})") from None
    unknown = set(raw) - {"thresholds", "audit", "privacy"}
    if unknown:
        raise ConfigError(f"{path}: unknown sections {sorted(unknown)}; read: [thresholds], [audit], [privacy]")
    privacy = raw.get("privacy", {})
    if set(privacy) - {"small_cell_threshold"}:
        raise ConfigError(f"{path}: [privacy] takes only small_cell_threshold in a network settings file")
    k = privacy.get("small_cell_threshold", NetworkSettings.small_cell_threshold)
    if isinstance(k, bool) or not isinstance(k, int) or k < 1:
        raise ConfigError(f"{path}: [privacy] small_cell_threshold must be a positive integer")
    audit = parse_audit_settings(raw["audit"], path) if "audit" in raw else AuditSettings()
    return NetworkSettings(audit=audit, small_cell_threshold=k, thresholds=raw.get("thresholds", {}))


def make_engine(engine: str, *, master: str, work: Path, spark_conf: dict[str, str] | None = None) -> Any:
    if engine == "duckdb":
        return DuckDBEngine(spill=work / "duckdb-spill")
    if engine == "spark":
        try:
            import pyspark  # noqa: F401 - only to name the missing extra
        except ImportError:
            raise ConfigError(
                "--engine spark needs pyspark and Java 17: pip install -e '.[spark]' (and a Java runtime)"
            ) from None
        return SparkEngine(spark_session(master, extra=spark_conf), work)
    raise ConfigError(f"unknown engine {engine!r}; choose one of {', '.join(ENGINES)}")


def run_network(
    lake: Path,
    output: Path,
    *,
    engine: str = "duckdb",
    master: str = "local[*]",
    settings: Path | NetworkSettings | None = None,
    engine_object: Any = None,
    verify: bool = True,
    log: Log | None = None,
) -> NetworkResult:
    """Run derive, rules and the audit's aggregate layer over every site of ``lake`` on the engine,
    write the outputs into ``output``, then publish each site's audit tables and report."""
    network = settings if isinstance(settings, NetworkSettings) else load_settings(settings)
    log = log or Log(quiet=True)
    manifests = read_manifests(lake)
    if verify:
        for manifest in manifests:
            verify_checksums(lake, manifest)
    catalogue = load_catalogue(network.thresholds)
    started_at = datetime.now(UTC)
    run_id = "network-" + started_at.strftime("%Y%m%dT%H%M%SZ")
    result = NetworkResult(engine=engine, sites=[m["site"] for m in manifests])
    work = Path(tempfile.mkdtemp(prefix="abg-network-"))
    runner = engine_object or make_engine(engine, master=master, work=work)
    empty: dict[str, pl.DataFrame] = {}
    try:
        started = time.monotonic()
        runner.load(read_lake(lake, manifests), catalogue_frame(catalogue))
        result.seconds["load"] = time.monotonic() - started
        for statement in stage_statements(catalogue, run_id, network.audit.period):
            started = time.monotonic()
            runner.run(statement)
            stage = statement.source.split("#")[0]
            result.seconds[stage] = result.seconds.get(stage, 0.0) + time.monotonic() - started
        result.untranslated = list(getattr(runner, "untranslated", []))
        started = time.monotonic()
        output.mkdir(parents=True, exist_ok=True)
        for table in STAGE_OUTPUTS:
            if (output / table).exists():
                shutil.rmtree(output / table)
            runner.write(table, output)
            empty[table] = runner.empty(table)
        result.seconds["write"] = time.monotonic() - started
        for table in STAGE_OUTPUTS:
            files = sorted((output / table).glob("site=*/*.parquet"))
            result.rows[table] = _parquet_rows(files)
    finally:
        if engine_object is None:
            runner.close()
        shutil.rmtree(work, ignore_errors=True)
    started = time.monotonic()
    run = {
        "run_id": run_id,
        "engine": engine,
        "started_at": started_at.replace(tzinfo=None),
        "finished_at": datetime.now(UTC).replace(tzinfo=None),
        "summary": (
            f"Network run on {engine} over the lake's {len(manifests)} sites; the site's exports were loaded, "
            "checked and reconciled by the site's own runs."
        ),
    }
    publications = publish_network(lake, manifests, output, empty.__getitem__, catalogue, network, run, log)
    result.seconds["publish"] = time.monotonic() - started
    result.rows["review_worklist"] = sum(p.worklist_rows for p in publications)
    (output / "network_run.json").write_text(
        json.dumps({"run_id": run_id, **result.__dict__}, indent=2, sort_keys=True) + "\n", encoding="utf-8"
    )
    return result


def _parquet_rows(files: list[Path]) -> int:
    import pyarrow.parquet as pq

    return sum(pq.ParquetFile(f).metadata.num_rows for f in files)
