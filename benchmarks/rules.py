"""Rule-evaluation benchmark: derive + rules over N records against the ingestion of them.

Generates (once, cached in --workdir) a US-style demo export of N rows, then measures,
each in a fresh process:

  baseline   ingest_file of the export into a fresh store (as shipped, with the contract)
  rules      derive + rules over every record of that store (a full re-check: the
             derived table, flags and audit status of all N records, then a checkpoint)

and prints seconds, records/s, the ratio to the baseline and the peak RSS of each.
Target: rule evaluation costs less than the ingestion of the same records.
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


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python benchmarks/rules.py",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Examples:\n  .venv/bin/python benchmarks/rules.py\n"
        "  .venv/bin/python benchmarks/rules.py --rows 5000000",
    )
    parser.add_argument("--rows", type=int, default=1_000_000, help="records (default 1000000)")
    parser.add_argument("--repeat", type=int, default=1, help="measure each this many times, interleaved; "
                        "the median is printed (default 1)")
    parser.add_argument("--seed", type=int, default=7, help="demo generator seed (default 7)")
    parser.add_argument(
        "--workdir", type=Path, default=DEFAULT_WORKDIR, help=f"cache for exports (default {DEFAULT_WORKDIR})"
    )
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    if args.rows < 1 or args.repeat < 1:
        print("error: --rows and --repeat must be positive", file=sys.stderr)
        return 2
    export = us_export(args.workdir, args.rows, args.seed)
    scratch = private_folder(args.workdir / "scratch" / "rules")
    store = scratch / "store.duckdb"
    config = write_site_config(scratch, store, export)

    rounds: dict[str, list[Measurement]] = {"ingest": [], "rules": []}
    for number in range(1, args.repeat + 1):
        print(f"round {number}/{args.repeat} ...", flush=True)
        remove_store(store)
        rounds["ingest"].append(
            measure("ingest", "ingest_file (baseline)", csv=export, db=store, profile=US_PROFILE, key=BENCH_KEY)
        )
        rounds["rules"].append(measure("analyse_all", "derive + rules, all records", config=config))
    remove_store(store)

    baseline, rules = combine(rounds["ingest"]), combine(rounds["rules"])
    print()
    print(f"rules benchmark: {args.rows:,} rows, US-style CSV of {fmt_bytes(export.stat().st_size)}; {machine_line()}")
    print(f"median of {args.repeat} interleaved run(s), each in a fresh process")
    print_table(baseline, [rules], rows_label="records/s")
    print(f"rules: {rules.detail['scope']:,} records derived and checked, {rules.detail['flags']:,} flags")
    print(verdict("rule evaluation vs ingestion", rules.seconds / baseline.seconds, 1.0))
    return 0


if __name__ == "__main__":
    sys.exit(main())
