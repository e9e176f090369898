"""Command line: ``python -m synthetic_data --rows 20000 --seed 7 --out DIR``."""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from datetime import date
from pathlib import Path

import polars as pl

from synthetic_data.faults import DEFAULT_FAULT_RATES, scale_fault_rates
from synthetic_data.generator import DEFAULT_DAYS, DEFAULT_SAO2_CALCULATED_SHARE, DEFAULT_START, generate_demo
from synthetic_data.hospital import SITE_NAME
from synthetic_data.lookalikes import DEFAULT_LOOKALIKE_RATES

DEFAULT_TOTAL = sum(DEFAULT_FAULT_RATES.values())


def _date(text: str) -> date:
    try:
        return date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a date in YYYY-MM-DD form: {text!r}") from None


def _whole_number(minimum: int) -> Callable[[str], int]:
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"must be at least {minimum}")
        return value

    return parse


def _share(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not 0.0 <= value <= 0.5:
        raise argparse.ArgumentTypeError("must be between 0 and 0.5")
    return value


def build_parser() -> argparse.ArgumentParser:
    fault_lines = "\n".join(f"  {name:<24} {rate:.3f}" for name, rate in DEFAULT_FAULT_RATES.items())
    lookalike_lines = "\n".join(f"  {name:<24} {rate:.3f}" for name, rate in DEFAULT_LOOKALIKE_RATES.items())
    parser = argparse.ArgumentParser(
        prog="python -m synthetic_data",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=(
            f"Write demo blood gas exports from the invented {SITE_NAME}: records that obey\n"
            "physiology, with faults injected at known rates and a ground-truth file naming each one.\n"
            "Everything is invented; the same arguments always give the same files."
        ),
        epilog=(
            "Output folder:\n"
            "  us_style/export_YYYY-MM-DD.csv       US-style CSV (profiles/demo_us_style.toml)\n"
            "  eu_style/export_YYYY-MM-DD.csv       European-style CSV (profiles/demo_eu_style.toml)\n"
            "  parquet/export_YYYY-MM-DD.parquet    Parquet (profiles/demo_parquet.toml)\n"
            "  ground_truth.parquet, ground_truth.csv   injected faults\n"
            "  lookalikes.parquet, lookalikes.csv       clinical look-alikes (real patients, no fault)\n"
            "  prescriptions/prescriptions_YYYY-MM-DD.csv  oxygen prescriptions, weekly (demo_prescriptions.toml)\n"
            "  prescriptions_truth.parquet/.csv, oxygen_truth.parquet   prescribing and oxygen truth\n"
            "  README.txt\n\n"
            f"Fault types and their default shares of all samples (total {DEFAULT_TOTAL:.3f}):\n"
            f"{fault_lines}\n\n"
            "Clinical look-alikes and their default shares of all samples:\n"
            f"{lookalike_lines}\n\n"
            "Examples:\n"
            "  python -m synthetic_data --out demo_exports\n"
            "  python -m synthetic_data --rows 5000000 --single-file --out bench_exports\n"
            "  python -m synthetic_data --fault-rate 0 --lookalike-rate 0 --out clean_only"
        ),
    )
    parser.add_argument("--out", type=Path, required=True, help="folder to write into (created if missing)")
    parser.add_argument("--rows", type=_whole_number(2), default=20_000, help="number of samples (default 20000)")
    parser.add_argument("--seed", type=int, default=7, help="random seed (default 7)")
    parser.add_argument(
        "--start-date",
        type=_date,
        default=DEFAULT_START,
        help=f"first collection day, YYYY-MM-DD (default {DEFAULT_START.isoformat()})",
    )
    parser.add_argument(
        "--days",
        type=_whole_number(1),
        default=DEFAULT_DAYS,
        help=f"number of collection days (default {DEFAULT_DAYS})",
    )
    parser.add_argument(
        "--fault-rate",
        type=_share,
        default=None,
        metavar="SHARE",
        help=f"total share of faulted samples, split like the defaults (default {DEFAULT_TOTAL:.3f}; 0 for clean data)",
    )
    parser.add_argument(
        "--lookalike-rate",
        type=_share,
        default=None,
        metavar="SHARE",
        help="share of samples per look-alike kind (default "
        f"{next(iter(DEFAULT_LOOKALIKE_RATES.values())):.3f}; 0 for none)",
    )
    parser.add_argument(
        "--sao2-calculated-share",
        type=float,
        default=DEFAULT_SAO2_CALCULATED_SHARE,
        metavar="SHARE",
        help="share of samples whose SaO2 is calculated from PO2, not measured "
        f"(default {DEFAULT_SAO2_CALCULATED_SHARE})",
    )
    parser.add_argument(
        "--single-file",
        action="store_true",
        help="one file per source instead of one per day (for benchmarks)",
    )
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    from synthetic_data.writers import write_exports  # after parsing, so --help stays quick

    rates = DEFAULT_FAULT_RATES if args.fault_rate is None else scale_fault_rates(args.fault_rate)
    kinds = None if args.lookalike_rate is None else dict.fromkeys(DEFAULT_LOOKALIKE_RATES, args.lookalike_rate)
    started = time.perf_counter()
    try:
        demo = generate_demo(
            args.rows,
            args.seed,
            args.start_date,
            args.days,
            rates,
            sao2_calculated_share=args.sao2_calculated_share,
            lookalike_rates=kinds,
        )
    except ValueError as err:
        print(f"error: {err}", file=sys.stderr)
        return 2
    generated = time.perf_counter()
    canonical, truth = demo.records, demo.faults
    try:
        written = write_exports(
            canonical,
            truth,
            args.out,
            lookalikes=demo.lookalikes,
            prescriptions=demo.prescriptions,
            oxygen=demo.oxygen,
            single_file=args.single_file,
            provenance={
                "seed": args.seed,
                "days": args.days,
                "from": args.start_date.isoformat(),
                "total fault rate": round(sum(rates.values()), 4),
            },
        )
    except OSError as err:
        print(f"error: cannot write to {args.out}: {err.strerror or err}", file=sys.stderr)
        return 74
    finished = time.perf_counter()

    print(
        f"{canonical.height} records from {SITE_NAME} (invented), {truth.height} with an injected fault, "
        f"{demo.lookalikes.height} clinical look-alikes, {demo.prescriptions.height} oxygen prescriptions"
    )
    for source, files in written.items():
        print(f"  {source:<9} {len(files):>4} file(s) in {args.out / source}")
    counts = truth.group_by("fault_type").agg(pl.len().alias("n"), pl.col("physically_visible").sum().alias("v"))
    for row in counts.sort("fault_type").iter_rows(named=True):
        print(f"  {row['fault_type']:<24} {row['n']:>7}  physically visible {row['v']:>7}")
    for row in demo.lookalikes.group_by("lookalike_kind").len().sort("lookalike_kind").iter_rows(named=True):
        print(f"  {row['lookalike_kind']:<24} {row['len']:>7}  look-alike records")
    print(f"generated in {generated - started:.1f} s, written in {finished - generated:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
