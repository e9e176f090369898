"""``abg-audit network``: the derive and rules stages over a lake of many sites, on DuckDB or Spark.

The outputs are the site's own tables (``stages.STAGE_OUTPUTS``) with a ``site`` column, written
as Parquet partitioned by site under the output folder, and ``network_run.json`` (engine, sites,
rows, seconds per stage). The thresholds are the catalogue's defaults, or a network's own
``[thresholds]`` file, the same for every site so that sites are compared like with like.
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

from pipeline.errors import ConfigError
from pipeline.network.engines import DuckDBEngine, SparkEngine, read_lake, spark_session
from pipeline.network.lake import read_manifests, verify_checksums
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


def load_thresholds(path: Path | None) -> dict[str, Any]:
    if path is None:
        return {}
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"{path}: thresholds file not found") from None
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"{path}: not valid TOML ({err})") from None
    unknown = set(raw) - {"thresholds"}
    if unknown:
        raise ConfigError(f"{path}: unknown sections {sorted(unknown)}; only [thresholds] is read")
    return raw.get("thresholds", {})


def make_engine(engine: str, *, master: str, work: Path, spark_conf: dict[str, str] | None = None) -> Any:
    if engine == "duckdb":
        return DuckDBEngine()
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
    thresholds: Path | None = None,
    engine_object: Any = None,
    verify: bool = True,
    period: str = "month",
) -> NetworkResult:
    """Run derive and rules over every site of ``lake``; write the outputs into ``output``."""
    manifests = read_manifests(lake)
    if verify:
        for manifest in manifests:
            verify_checksums(lake, manifest)
    catalogue = load_catalogue(load_thresholds(thresholds))
    run_id = "network-" + datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    result = NetworkResult(engine=engine, sites=[m["site"] for m in manifests])
    work = Path(tempfile.mkdtemp(prefix="abg-network-"))
    runner = engine_object or make_engine(engine, master=master, work=work)
    try:
        started = time.monotonic()
        runner.load(read_lake(lake, manifests), catalogue_frame(catalogue))
        result.seconds["load"] = time.monotonic() - started
        for statement in stage_statements(catalogue, run_id, period):
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
        result.seconds["write"] = time.monotonic() - started
        for table in STAGE_OUTPUTS:
            files = sorted((output / table).glob("site=*/*.parquet"))
            result.rows[table] = _parquet_rows(files)
    finally:
        if engine_object is None:
            runner.close()
        shutil.rmtree(work, ignore_errors=True)
    (output / "network_run.json").write_text(
        json.dumps({"run_id": run_id, **result.__dict__}, indent=2, sort_keys=True) + "\n", encoding="utf-8"
    )
    return result


def _parquet_rows(files: list[Path]) -> int:
    import pyarrow.parquet as pq

    return sum(pq.ParquetFile(f).metadata.num_rows for f in files)
