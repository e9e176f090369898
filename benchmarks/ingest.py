"""Ingestion benchmark: our ingestion of one US-style export against DuckDB's bare load.

Generates (once, cached in --workdir) a US-style demo export of N rows, then measures,
each in a fresh process and into a fresh DuckDB file:

  baseline   DuckDB alone: CREATE TABLE ... AS SELECT * FROM read_csv(file)
  ingest     ingest_file without the batch contract: DuckDB reads and types the file, the
             Python parser reads the unusual rows, convert, classify, merge into records /
             quarantine
  ingest + contract   the same with the batch contract (great-expectations on a sample, SQL
             counts over every row), as a run loads a file; great-expectations is imported
             before the clock starts (a run imports it once, whatever its number of files)
             and its import time is printed apart
  full run   the whole nightly run on that file: ingest + derive + rules + later stages (--full-run)

and prints seconds, rows/s, the ratio to the baseline and the peak RSS of each, for each
--rows given (e.g. --rows 1000000 5000000: both sizes side by side in one run).
Targets: ingest within 2x the bare load and peak RSS <= 2 GiB at 5 M rows; full run within
4x the bare load.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from common import (
    BENCH_KEY,
    DEFAULT_WORKDIR,
    US_PROFILE,
    Measurement,
    combine,
    fmt_bytes,
    machine_line,
    measure,
    print_table,
    private_folder,
    remove_store,
    us_export,
    verdict,
    write_site_config,
)

GIB = 1024**3


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python benchmarks/ingest.py",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Examples:\n  .venv/bin/python benchmarks/ingest.py\n"
        "  .venv/bin/python benchmarks/ingest.py --rows 5000000 --full-run --repeat 3",
    )
    parser.add_argument(
        "--rows", type=int, nargs="+", default=[1_000_000], help="data rows in the export; several sizes are "
        "measured one after the other and printed together (default 1000000)"
    )
    parser.add_argument("--repeat", type=int, default=1, help="measure each this many times, interleaved; "
                        "the median is printed (default 1)")
    parser.add_argument(
        "--full-run", action="store_true", help="also time a whole run (ingest, derive, rules, audit, outputs)"
    )
    parser.add_argument("--breakdown", action="store_true", help="with --full-run: time and peak memory per stage")
    parser.add_argument("--seed", type=int, default=7, help="demo generator seed (default 7)")
    parser.add_argument(
        "--workdir", type=Path, default=DEFAULT_WORKDIR, help=f"cache for exports (default {DEFAULT_WORKDIR})"
    )
    return parser


def measure_size(args: argparse.Namespace, rows: int) -> tuple[Measurement, list[Measurement], int]:
    """Every measurement of one export size: the baseline and ours, interleaved per round."""
    workdir: Path = args.workdir
    export = us_export(workdir, rows, args.seed)
    scratch = private_folder(workdir / "scratch")
    bare_db, ingest_db, run_db = scratch / "bare.duckdb", scratch / "ingest.duckdb", scratch / "run.duckdb"
    config = write_site_config(scratch / "full_run", run_db, export)

    rounds: dict[str, list[Measurement]] = {"bare": [], "own": [], "ingest": [], "full": []}
    for number in range(1, args.repeat + 1):
        print(f"{rows:,} rows, round {number}/{args.repeat} ...", flush=True)
        remove_store(bare_db)
        rounds["bare"].append(measure("bare_load", "DuckDB bare read_csv (baseline)", csv=export, db=bare_db))
        remove_store(ingest_db)
        rounds["own"].append(
            measure(
                "ingest",
                "ingest (no contract)",
                csv=export,
                db=ingest_db,
                profile=US_PROFILE,
                key=BENCH_KEY,
                contract=False,
            )
        )
        remove_store(ingest_db)
        rounds["ingest"].append(
            measure("ingest", "ingest + contract", csv=export, db=ingest_db, profile=US_PROFILE, key=BENCH_KEY)
        )
        if args.full_run:
            remove_store(run_db)
            rounds["full"].append(
                measure("full_run", "full run (all stages)", config=config, breakdown=args.breakdown)
            )
    for path in (bare_db, ingest_db, run_db):
        remove_store(path)
    ours = [combine(rounds["own"]), combine(rounds["ingest"])]
    ours += [combine(rounds["full"])] if args.full_run else []
    return combine(rounds["bare"]), ours, export.stat().st_size


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    if any(r < 1 for r in args.rows) or args.repeat < 1:
        print("error: --rows and --repeat must be positive", file=sys.stderr)
        return 2
    results = [(rows, *measure_size(args, rows)) for rows in args.rows]
    for rows, baseline, ours, size in results:
        print()
        print(f"ingest benchmark: {rows:,} rows, US-style CSV of {fmt_bytes(size)}; {machine_line()}")
        print(f"median of {args.repeat} interleaved run(s), each in a fresh process and a fresh store")
        print_table(baseline, ours)
        detail = ours[1].detail
        print(
            f"reconciliation: {detail['rows_in']:,} rows in = {detail['loaded']:,} loaded + "
            f"{detail['quarantined']:,} quarantined + {detail['duplicates']:,} duplicates + "
            f"{detail['superseded_in_file']:,} superseded in file"
        )
        print(
            f"great-expectations import, once per process (not in the ingest + contract time): "
            f"{detail['library_import_seconds']:.2f} s"
        )
        for m in ours[:2]:
            print(verdict(f"{m.label} vs bare load", m.seconds / baseline.seconds, 2.0))
            print(verdict(f"{m.label} peak RSS", m.peak_rss / GIB, 2.0, " GiB"))
        if args.full_run:
            full = ours[2]
            print(verdict("full run vs bare load", full.seconds / baseline.seconds, 4.0))
            print(verdict("full run peak RSS", full.peak_rss / GIB, 2.0, " GiB"))
            print(f"full run: {full.detail['scope']:,} samples derived and checked, {full.detail['flags']:,} flags")
            if args.breakdown:
                print("full run by stage (last run): seconds, and the peak RSS a stage raised the process to")
                for name, seconds in full.detail["stages"].items():
                    peak = full.detail["peaks"].get(name)
                    print(f"  {name:<30}{seconds:>9.2f}" + (f"{fmt_bytes(peak):>12}" if peak else ""))
    if len(results) > 1:
        first, last = results[0], results[-1]
        growth = last[2][1].seconds / first[2][1].seconds
        print(f"\ningest + contract, {last[0]:,} rows / {first[0]:,} rows: {growth:.2f}x the time "
              f"for {last[0] / first[0]:.1f}x the rows")
    return 0


if __name__ == "__main__":
    sys.exit(main())
