"""Nightly-run benchmark: adding a small file to a small store and to a big one.

Builds three stores once (cached under --workdir, reused by later runs), each by a full
run: one of --big records (default 5 M: the demo export and earlier copies of it, about
three years of a network's results) and two of about --small records (default 50 k):

  latest days    the last --small rows of the same export: about one month, so the
                 report's 12-month window holds one period;
  same history   every sample of a share of the export's patients (by a hash of the MRN):
                 the big store's three years, units and periods with --small / --big
                 of its patients, so the report's window is as full as the big store's.

The first compares store size and history together; the second store size alone: its
report window covers the same periods, units and questions as the big store's.

Then, for each store, --repeat times: copy the store, and run the nightly job on an input
folder that holds the export already loaded plus a nightly file of --nightly new samples
(default 2 k: new accession numbers for patients of the latest days, collected on the next
day; the same file for every store, so most of its patients are new to the same-history
store). Each run is a fresh process.

Prints the run times side by side. Target: the big store's run within 1.5x of a small
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
    patients_export,
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
    latest_export = tail_export(workdir, args.small, args.big, args.seed)
    history_export = patients_export(workdir, args.small, args.big, args.seed)
    nightly = nightly_export(workdir, args.nightly, latest_export)
    names = {"latest": "small store, latest days", "history": "small store, same history", "big": "big store"}
    stores = {
        "latest": built_store(workdir, latest_export),
        "history": built_store(workdir, history_export),
        "big": built_store(workdir, big_export),
    }
    held = {name: _records(store) for name, (store, _inputs) in stores.items()}
    runs = private_folder(workdir / "incremental" / "runs")

    rounds: dict[str, list[Measurement]] = {name: [] for name in stores}
    for number in range(1, args.repeat + 1):
        print(f"round {number}/{args.repeat} ...", flush=True)
        for name, (store, inputs) in stores.items():
            (inputs / "nightly.csv").unlink(missing_ok=True)
            _link(nightly, inputs / "nightly.csv")
            folder = private_folder(runs / f"store_{name}")
            copy = folder / "store.duckdb"
            copy_store(store, copy)
            config = write_site_config(folder, copy, inputs)
            label = f"nightly +{args.nightly:,} on {held[name]:,} ({names[name]})"
            rounds[name].append(measure("full_run", label, config=config, breakdown=args.breakdown))
            remove_store(copy)

    latest, history, big = (combine(rounds[name]) for name in ("latest", "history", "big"))
    print()
    print(f"incremental benchmark: a nightly file of {args.nightly:,} new samples; {machine_line()}")
    print(f"median of {args.repeat} interleaved run(s), each on a fresh copy of the store, in a fresh process")
    print_table(latest, [history, big], rows_label="records/s")
    for m in (latest, history, big):
        print(f"  {m.label}: {m.detail['loaded']:,} loaded, {m.detail['scope']:,} samples re-derived and checked")
    print(verdict("big store vs small store, latest days", big.seconds / latest.seconds, 1.5))
    print(verdict("big store vs small store, same history", big.seconds / history.seconds, 1.5))
    if args.breakdown:
        _print_breakdown(rounds["history"][-1], rounds["big"][-1])
    return 0


def _records(store: Path) -> int:
    """Records the built store holds (read-only, before the run's copy is made)."""
    import duckdb

    con = duckdb.connect(str(store), read_only=True)
    try:
        return int(con.execute("select count(*) from records").fetchall()[0][0])
    finally:
        con.close()


def _print_breakdown(small: Measurement, big: Measurement) -> None:
    """Stages and slowest statements of the last run on the same-history small store and the big one."""
    print("\nstages (last run, seconds: small store, big store)")
    for name in small.detail["stages"]:
        print(f"  {name:<34}{small.detail['stages'][name]:>9.2f}{big.detail['stages'].get(name, 0.0):>9.2f}")
    print("\nslowest statements in the big store's run (seconds: small store, big store)")
    statements: dict[str, float] = big.detail["statements"]
    for label, seconds in list(statements.items())[:15]:
        print(f"  {label[:60]:<62}{small.detail['statements'].get(label, 0.0):>8.2f}{seconds:>8.2f}")


if __name__ == "__main__":
    sys.exit(main())
