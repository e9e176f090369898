"""The network run (derive, rules and the audit over every site of a lake) on DuckDB and on Spark local mode.

For each lake size: DuckDB (the reference), Spark ``local[1]`` and Spark ``local[2]``, each in a
fresh process, side by side; then the Spark outputs are compared with DuckDB's (flags, derived
values to 1e-9, audit status, analyser checks, the aggregate layer, every site's published
tables), so the run is also the agreement check at that size. The engine's seconds (loading the
lake, the stages, writing the outputs) are shown apart from the publication's (each site's audit
tables and report, built from the engine's layer by the same local code whatever the engine).
Lakes are demo lakes of five invented hospitals (``pipeline/network/demo_lake.py``), cached under
``--workdir``.

    .venv/bin/python benchmarks/network.py --rows 1000000 5000000
    .venv/bin/python benchmarks/network.py --rows 200000 --engines duckdb spark:local[2]

Needs the [spark] extra and Java 17 for the Spark runs.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
SITES = 5
DEFAULT_WORKDIR = Path(tempfile.gettempdir()) / "abg_audit_bench" / "network"
DEFAULT_ENGINES = ("duckdb", "spark:local[1]", "spark:local[2]")


def lake_for(rows: int, workdir: Path) -> Path:
    lake = workdir / f"lake-{rows}"
    if not (lake / "manifests").exists():
        sys.path.insert(0, str(REPO))
        from pipeline.network.demo_lake import build_demo_lake

        started = time.monotonic()
        build_demo_lake(lake, sites=SITES, rows_per_site=rows // SITES)
        print(f"built the {rows:,}-row lake in {time.monotonic() - started:.0f} s: {lake}", flush=True)
    return lake


def measure_one(engine: str, lake: Path, output: Path, memory: str) -> dict:
    """One run in this process (called in a fresh subprocess): seconds, peak RSS, rows."""
    from pipeline.network.engines import SparkEngine, spark_session
    from pipeline.network.run import run_network

    started = time.monotonic()
    engine_object = None
    if engine.startswith("spark:"):
        session = spark_session(engine.split(":", 1)[1], memory=memory, shuffle_partitions=8)
        engine_object = SparkEngine(session, output.parent / f"work-{output.name}")
    session_seconds = time.monotonic() - started
    started = time.monotonic()
    result = run_network(lake, output, engine=engine.split(":")[0], engine_object=engine_object)
    seconds = time.monotonic() - started
    if engine_object is not None:
        shutil.rmtree(engine_object.work, ignore_errors=True)  # the intermediate relations
    publish = result.seconds.get("publish", 0.0)
    return {
        "engine": engine,
        "seconds": seconds - publish,
        "publish_seconds": publish,
        "session_seconds": session_seconds,
        "stage_seconds": result.seconds,
        "rows": result.rows,
        "peak_rss_python": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
        "untranslated": result.untranslated,
    }


def agreement(reference: Path, other: Path) -> list[str]:
    import polars as pl

    from pipeline.audit import PUBLISHED_TABLES
    from pipeline.network.compare import differences, published_differences
    from pipeline.network.stages import STAGE_OUTPUTS

    problems = []
    for table in STAGE_OUTPUTS:
        frames = [
            pl.read_parquet(folder / table / "**" / "*.parquet", hive_partitioning=True).with_columns(
                pl.col("site").cast(pl.String)
            )
            for folder in (reference, other)
        ]
        problems += differences(table, *frames, limit=5)
    for table in PUBLISHED_TABLES:
        frames = [
            pl.read_parquet(folder / "published" / "tables" / f"{table}.parquet") for folder in (reference, other)
        ]
        problems += published_differences(table, *frames, limit=5)
    return problems


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 5_000_000], help="lake sizes (samples)")
    parser.add_argument("--engines", nargs="+", default=list(DEFAULT_ENGINES))
    parser.add_argument("--workdir", type=Path, default=DEFAULT_WORKDIR)
    parser.add_argument("--spark-memory", default="4g", help="spark.driver.memory (local mode: all of Spark)")
    parser.add_argument("--one", nargs=3, metavar=("ENGINE", "LAKE", "OUTPUT"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        engine, lake, output = args.one
        print(json.dumps(measure_one(engine, Path(lake), Path(output), args.spark_memory)))
        return
    args.workdir.mkdir(parents=True, exist_ok=True)
    print(f"{os.cpu_count()} cores; load average {os.getloadavg()[0]:.1f} at start", flush=True)
    table = []
    for rows in args.rows:
        lake = lake_for(rows, args.workdir)
        outputs = {}
        for engine in args.engines:
            output = args.workdir / f"out-{rows}-{engine.replace(':', '-').replace('[', '').replace(']', '')}"
            command = [
                sys.executable,
                __file__,
                "--one",
                engine,
                str(lake),
                str(output),
                "--spark-memory",
                args.spark_memory,
            ]
            done = subprocess.run(command, capture_output=True, text=True, cwd=REPO, check=False)
            if done.returncode != 0:
                print(done.stderr[-3000:], file=sys.stderr)
                raise SystemExit(f"{engine} on {rows:,} rows failed")
            figures = json.loads(done.stdout.strip().splitlines()[-1])
            outputs[engine] = output
            table.append((rows, figures))
            print(
                f"{rows:>9,} {engine:<16} {figures['seconds']:8.1f} s (+ {figures['session_seconds']:.1f} s "
                f"session start; publication {figures['publish_seconds']:.1f} s), flags {figures['rows']['flags']:,}; "
                f"load average {os.getloadavg()[0]:.1f}",
                flush=True,
            )
        reference = outputs.get("duckdb")
        for engine, output in outputs.items():
            if reference is not None and engine != "duckdb":
                problems = agreement(reference, output)
                verdict = "identical" if not problems else f"{len(problems)}+ differences: {problems[:3]}"
                print(f"{rows:>9,} {engine:<16} against duckdb: {verdict}", flush=True)
    print("\n| lake rows | engine | engine seconds | x DuckDB | samples/s | session start (s) | publication (s) |")
    print("|---|---|---|---|---|---|---|")
    base = {rows: f["seconds"] for rows, f in table if f["engine"] == "duckdb"}
    for rows, f in table:
        ratio = f["seconds"] / base[rows] if rows in base else float("nan")
        print(
            f"| {rows / 1e6:g} M | {f['engine']} | {f['seconds']:.1f} | {ratio:.2f} | "
            f"{rows / f['seconds']:,.0f} | {f['session_seconds']:.1f} | {f['publish_seconds']:.1f} |"
        )
    sizes = sorted(base)
    if len(sizes) >= 2:
        small, large = sizes[0], sizes[-1]
        for engine in args.engines:
            times = {rows: f["seconds"] for rows, f in table if f["engine"] == engine}
            if small in times and large in times:
                print(f"{engine}: {large / small:.0f}x the rows took {times[large] / times[small]:.2f}x the time")


if __name__ == "__main__":
    main()
