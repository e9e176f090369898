"""Load rate of the standard feeds: the same demo samples as CSV, Parquet, FHIR R4 NDJSON and
HL7 v2, each through ``ingest_file`` into a fresh store, beside DuckDB's bare ``read_json`` of
the FHIR NDJSON file (every resource a row, no grouping, no checks) in the same run.

    .venv/bin/python benchmarks/standard_feeds.py --observations 1000000

The demo generator writes enough samples for about that many observations in the FHIR file
(one Observation per value); the other formats hold the same samples (the US-style CSV and
the HL7 v2 feed carry the laboratory's fields, the Parquet and FHIR files the co-oximetry
fields too, so their observation counts differ a little: each is printed). Each measurement
runs in a fresh interpreter (``tasks.py`` for ingestion, this script for the bare read), and
rates are observations per second, so the four formats compare on what they carry.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import duckdb

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from benchmarks.common import (  # noqa: E402
    BENCH_KEY,
    DEFAULT_WORKDIR,
    REPO,
    Measurement,
    machine_line,
    measure,
    print_table,
    private_folder,
    remove_store,
)

# Observations per sample in the FHIR file of the demo (measured: about 24).
OBSERVATIONS_PER_SAMPLE = 24
FORMATS = {
    "csv": ("us_style", "demo_us_style.toml", "csv"),
    "parquet": ("parquet", "demo_parquet.toml", "parquet"),
    "fhir": ("fhir", "demo_fhir.toml", "ndjson"),
    "hl7v2": ("hl7v2", "demo_hl7v2.toml", "hl7"),
}


def bare_read_json(path: str, db: str) -> dict[str, float | int]:
    """Baseline, in this process: DuckDB alone reads the NDJSON file into a table."""
    started = time.perf_counter()
    con = duckdb.connect(db)
    con.execute("create table export as select * from read_json(?, format = 'newline_delimited')", [path])
    rows = con.execute("select count(*) from export").fetchall()[0][0]
    con.close()
    return {"seconds": time.perf_counter() - started, "rows": rows}


def write_exports(workdir: Path, samples: int, seed: int) -> dict[str, Path]:
    """The demo's samples in every format, one file each (cached per size and seed)."""
    from synthetic_data import generate_demo
    from synthetic_data.feed_writers import write_feed
    from synthetic_data.writers import PROFILES_DIR, _write_source

    folder = workdir / f"feeds_{samples}_{seed}"
    paths = {name: folder / source / f"export_all.{ext}" for name, (source, _p, ext) in FORMATS.items()}
    if all(p.exists() for p in paths.values()):
        return paths
    demo = generate_demo(samples, seed)
    rows, truth = demo.records, demo.faults
    for name, (source, _profile, _ext) in FORMATS.items():
        if name in ("fhir", "hl7v2"):
            write_feed(name, rows, truth, folder, True, PROFILES_DIR)
        else:
            _write_source(rows, truth, source, folder, True, PROFILES_DIR)
    return paths


def observations(name: str, path: Path) -> int:
    """The values a file carries: Observation lines, OBX segments, or non-empty analyte cells."""
    if name == "fhir":
        with path.open("rb") as handle:
            return sum(1 for line in handle if b'"resourceType": "Observation"' in line)
    if name == "hl7v2":
        return path.read_bytes().count(b"\rOBX|")
    import polars as pl

    from pipeline.ingest.feeds.mapping import RECORD_ATTRIBUTES
    from pipeline.profile import load_profile

    profile = load_profile(REPO / "profiles" / FORMATS[name][1])
    analytes = [h for f, h in profile.columns.items() if f not in RECORD_ATTRIBUTES]
    frame = pl.read_parquet(path) if name == "parquet" else pl.read_csv(path, infer_schema=False)
    return int(sum(frame.get_column(c).cast(pl.String).fill_null("").ne("").sum() for c in analytes))


def measure_bare(path: Path, db: Path) -> Measurement:
    command = [sys.executable, str(Path(__file__).resolve()), "--bare-read-json", str(path), str(db)]
    done = subprocess.run(command, cwd=REPO, capture_output=True, text=True, check=True)
    result = json.loads(done.stdout.strip().splitlines()[-1])
    return Measurement(
        "DuckDB bare read_json of the FHIR NDJSON (baseline)",
        result["seconds"],
        result["rows"],
        result["peak_rss"],
        runs=[result["seconds"]],
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--observations", type=int, default=1_000_000, help="about this many in the FHIR file")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--workdir", type=Path, default=DEFAULT_WORKDIR)
    parser.add_argument("--formats", nargs="+", choices=list(FORMATS), default=list(FORMATS))
    parser.add_argument("--bare-read-json", nargs=2, metavar=("NDJSON", "DB"), help=argparse.SUPPRESS)
    parser.add_argument("--write-exports", type=int, metavar="SAMPLES", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.bare_read_json:
        result = bare_read_json(*args.bare_read_json)
        result["peak_rss"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
        print(json.dumps(result))
        return
    if args.write_exports:
        paths = write_exports(args.workdir, args.write_exports, args.seed)
        print(json.dumps({name: [str(path), observations(name, path)] for name, path in paths.items()}))
        return

    workdir = private_folder(args.workdir)
    samples = max(100, args.observations // OBSERVATIONS_PER_SAMPLE)
    # written in a child process: Linux keeps a process's peak RSS across exec, so the
    # generator's memory would otherwise show in every measurement's peak RSS
    command = [sys.executable, str(Path(__file__).resolve()), "--write-exports", str(samples), "--seed",
               str(args.seed), "--workdir", str(workdir)]  # fmt: skip
    done = subprocess.run(command, cwd=REPO, capture_output=True, text=True, check=True)
    written = json.loads(done.stdout.strip().splitlines()[-1])
    paths = {name: Path(path) for name, (path, _count) in written.items()}
    counts = {name: count for name, (_path, count) in written.items()}
    print(machine_line())
    print(f"{samples:,} demo samples; observations per file: " + ", ".join(f"{k} {v:,}" for k, v in counts.items()))
    db = workdir / "feeds_bench.duckdb"
    remove_store(db)
    baseline = measure_bare(paths["fhir"], db)
    baseline.rows = counts["fhir"]  # rate in observations, as the others
    measured = []
    for name, path in paths.items():
        if name not in args.formats:
            continue
        remove_store(db)
        m = measure(
            "ingest",
            f"ingest {name} ({path.name})",
            csv=path,
            db=db,
            profile=REPO / "profiles" / FORMATS[name][1],
            key=BENCH_KEY,
        )
        detail = m.detail
        m.rows = counts[name]
        print(
            f"  {name}: {detail['rows_in']:,} records in = {detail['loaded']:,} loaded + {detail['quarantined']:,} "
            f"quarantined + {detail['duplicates']:,} duplicates + {detail['superseded_in_file']:,} superseded"
        )
        measured.append(m)
    remove_store(db)
    print()
    print_table(baseline, measured, rows_label="obs/s")


if __name__ == "__main__":
    main()
