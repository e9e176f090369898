"""Nightly-run benchmark: adding a small file to a small store and to a big one.

Builds two stores once (cached under --workdir, reused by later runs), each by a full
run: one of --big records (default 5 M: the demo export and earlier copies of it, about
three years of a network's results) and one of --small records (default 50 k: the last
days of the same export). Then, for each store, --repeat times: copy the store, and run
the nightly job on an input folder that holds the export already loaded plus a nightly
file of --nightly new samples (default 2 k: new accession numbers for patients of those
last days, collected on the next day). Each run is a fresh process.

Prints both run times side by side. Target: the big store's run within 1.5x of the small
store's. --breakdown adds the time of each stage and of the slowest SQL statements.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from common import (
    DEFAULT_WORKDIR,
    Measurement,
    combine,
    copy_store,
    fmt_bytes,
    machine_line,
    measure,
    nightly_export,
    print_table,
    private_folder,
    remove_store,
    tail_export,
    us_export,
    verdict,
    write_site_config,
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python benchmarks/incremental.py",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Examples:\n  .venv/bin/python benchmarks/incremental.py --workdir bench-cache\n"
        "  .venv/bin/python benchmarks/incremental.py --big 1000000 --repeat 5 --breakdown",
    )
    parser.add_argument("--small", type=int, default=50_000, help="records in the small store (default 50000)")
    parser.add_argument("--big", type=int, default=5_000_000, help="records in the big store (default 5000000)")
    parser.add_argument("--nightly", type=int, default=2_000, help="new records in the nightly file (default 2000)")
    parser.add_argument("--repeat", type=int, default=3, help="nightly runs per store, interleaved (default 3)")
    parser.add_argument("--breakdown", action="store_true", help="time each stage and the slowest statements")
    parser.add_argument("--seed", type=int, default=7, help="demo generator seed (default 7)")
    parser.add_argument(
        "--workdir",
        type=Path,
        default=DEFAULT_WORKDIR,
        help=f"cache for exports and the built stores (default {DEFAULT_WORKDIR})",
    )
    return parser


def _link(source: Path, target: Path) -> None:
    if not target.exists():
        try:
            os.link(source, target)
        except OSError:  # another file system: a copy keeps working, only slower to make
            target.write_bytes(source.read_bytes())


def built_store(workdir: Path, export: Path) -> tuple[Path, Path]:
    """The store of one export after a full run, and its input folder (built once)."""
    home = private_folder(workdir / "incremental" / export.stem)
    inputs = home / "inputs"
    inputs.mkdir(exist_ok=True)
    _link(export, inputs / "base.csv")
    store = home / "store.duckdb"
    done = home / "built"
    if not done.exists():
        remove_store(store)
        config = write_site_config(home / "build", store, inputs)
        text = config.read_text(encoding="utf-8").replace('pattern = "*.csv"', 'pattern = "base.csv"')
        config.write_text(text, encoding="utf-8")
        print(f"building a store from {export.name} once (a full run) ...", flush=True)
        built = measure("full_run", f"build {export.stem}", config=config)
        print(f"  built in {built.seconds:.0f} s, peak RSS {fmt_bytes(built.peak_rss)}", flush=True)
        done.write_text(f"{built.seconds:.1f} s, peak RSS {built.peak_rss}\n", encoding="utf-8")
    return store, inputs


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    if min(args.small, args.big, args.nightly, args.repeat) < 1:
        print("error: sizes and --repeat must be positive", file=sys.stderr)
        return 2
    workdir: Path = args.workdir
    big_export = us_export(workdir, args.big, args.seed)
    small_export = tail_export(workdir, args.small, args.big, args.seed)
    nightly = nightly_export(workdir, args.nightly, small_export)
    stores = {args.small: built_store(workdir, small_export), args.big: built_store(workdir, big_export)}
    runs = private_folder(workdir / "incremental" / "runs")

    rounds: dict[int, list[Measurement]] = {args.small: [], args.big: []}
    for number in range(1, args.repeat + 1):
        print(f"round {number}/{args.repeat} ...", flush=True)
        for size, (store, inputs) in stores.items():
            (inputs / "nightly.csv").unlink(missing_ok=True)
            _link(nightly, inputs / "nightly.csv")
            folder = private_folder(runs / f"store_{size}")
            copy = folder / "store.duckdb"
            copy_store(store, copy)
            config = write_site_config(folder, copy, inputs)
            label = f"nightly +{args.nightly:,} on {size:,}"
            rounds[size].append(measure("full_run", label, config=config, breakdown=args.breakdown))
            remove_store(copy)

    small, big = combine(rounds[args.small]), combine(rounds[args.big])
    print()
    print(f"incremental benchmark: a nightly file of {args.nightly:,} new samples; {machine_line()}")
    print(f"median of {args.repeat} interleaved run(s), each on a fresh copy of the store, in a fresh process")
    print_table(small, [big], rows_label="records/s")
    for m in (small, big):
        print(f"  {m.label}: {m.detail['loaded']:,} loaded, {m.detail['scope']:,} samples re-derived and checked")
    print(verdict("big store vs small store", big.seconds / small.seconds, 1.5))
    if args.breakdown:
        _print_breakdown(rounds[args.small][-1], rounds[args.big][-1])
    return 0


def _print_breakdown(small: Measurement, big: Measurement) -> None:
    print("\nstages (last run, seconds: small store, big store)")
    for name in small.detail["stages"]:
        print(f"  {name:<34}{small.detail['stages'][name]:>9.2f}{big.detail['stages'].get(name, 0.0):>9.2f}")
    print("\nslowest statements in the big store's run (seconds: small store, big store)")
    statements: dict[str, float] = big.detail["statements"]
    for label, seconds in list(statements.items())[:15]:
        print(f"  {label[:60]:<62}{small.detail['statements'].get(label, 0.0):>8.2f}{seconds:>8.2f}")


if __name__ == "__main__":
    sys.exit(main())
