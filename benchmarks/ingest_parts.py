"""Where ingestion's time goes, part by part, beside DuckDB's bare load of the same file.

On the cached US-style export of --rows rows (the one ``ingest.py`` uses), each in a fresh
process and, with --repeat, interleaved round by round:

  bare load            baseline: DuckDB alone, CREATE TABLE ... AS SELECT * FROM read_csv(file)
  read as text         every cell read as text in the profile's dialect, aggregated, nothing
                       stored: reading alone
  parse and convert    the stage 1 SELECT of ingest_file (DuckDB types every cell, tests that
                       SQL types it exactly as the Python parser would, converts units, checks
                       hard limits), aggregated, nothing stored
    ... every cell usual   the same without the exactness tests (what they cost)
  stage                the same SELECT into the temp table stage_units, as ingest_file builds it
  write records        the file's records (loaded by ingest_file), held in memory, inserted into
                       an empty table of the same columns in one transaction: the compressed write
    ... identifiers uncompressed   the same with the identifier and pseudonym columns declared
                       USING COMPRESSION uncompressed; the table's size on disk is printed too
  ingest + contract    ingest_file as a run calls it (great-expectations imported first)

The parts overlap, so they do not add up to ingest_file. They show the floor of the present
design: a file is typed once into the stage (a statement writes one table, so the rows that
go to quarantine or to the Python parser cannot be split off while typing straight into
records), then its new rows are written to records. "stage" + "write records" is therefore
paid by any file, before keys, duplicates, the contract and the ledger.
"""

from __future__ import annotations

import argparse
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
)

PARTS = (
    ("read", "read as text"),
    ("parse", "parse and convert"),
    ("parse_all_usual", "  ... every cell usual"),
    ("stage", "stage"),
    ("ingest", "ingest + contract"),
    ("write", "write records"),
    ("write_uncompressed", "  ... identifiers uncompressed"),
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python benchmarks/ingest_parts.py",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Example:\n  .venv/bin/python benchmarks/ingest_parts.py --rows 1000000 --repeat 3",
    )
    parser.add_argument("--rows", type=int, default=1_000_000, help="data rows in the export (default 1000000)")
    parser.add_argument("--repeat", type=int, default=1, help="rounds, interleaved; medians are printed (default 1)")
    parser.add_argument("--seed", type=int, default=7, help="demo generator seed (default 7)")
    parser.add_argument(
        "--workdir", type=Path, default=DEFAULT_WORKDIR, help=f"cache for exports (default {DEFAULT_WORKDIR})"
    )
    return parser


def one_round(export: Path, scratch: Path) -> dict[str, Measurement]:
    csv, profile = str(export), str(US_PROFILE)
    work, loaded, written = scratch / "part.duckdb", scratch / "ingest.duckdb", scratch / "written.duckdb"
    found: dict[str, Measurement] = {}

    def run(name: str, task: str, label: str, db: Path, **args: object) -> None:
        remove_store(db)
        found[name] = measure(task, label, db=db, **args)

    run("bare", "bare_load", "DuckDB bare read_csv (baseline)", work, csv=csv)
    run("read", "read_as_text", dict(PARTS)["read"], work, csv=csv, profile=profile)
    run("parse", "parse_and_convert", dict(PARTS)["parse"], work, csv=csv, profile=profile)
    run("parse_all_usual", "parse_and_convert", dict(PARTS)["parse_all_usual"], work, csv=csv, profile=profile,
        all_usual=True)
    run("stage", "parse_and_convert", dict(PARTS)["stage"], work, csv=csv, profile=profile, store=True)
    run("ingest", "ingest", dict(PARTS)["ingest"], loaded, csv=csv, profile=profile, key=BENCH_KEY)
    run("write", "write_records", dict(PARTS)["write"], written, source=loaded)
    run("write_uncompressed", "write_records", dict(PARTS)["write_uncompressed"], written, source=loaded,
        uncompressed=True)
    for db in (work, loaded, written):
        remove_store(db)
    return found


def main() -> None:
    args = build_parser().parse_args()
    export = us_export(args.workdir, args.rows, args.seed)
    scratch = private_folder(args.workdir / "scratch")
    rounds = [one_round(export, scratch) for _ in range(args.repeat)]
    result = {name: combine([r[name] for r in rounds]) for name in rounds[0]}
    print(machine_line())
    print(f"export: {export.name}, {export.stat().st_size / 2**20:.0f} MiB, {args.rows} rows, {args.repeat} round(s)\n")
    bare = result["bare"]
    print_table(bare, [result[name] for name, _ in PARTS])
    floor = result["stage"].seconds + result["write"].seconds
    print(f"\nstage + write records: {floor:.2f} s = {floor / bare.seconds:.2f}x the bare load")
    for name in ("write", "write_uncompressed"):
        print(f"{dict(PARTS)[name].strip(' .')}: table size {fmt_bytes(result[name].detail['table_bytes'])}")


if __name__ == "__main__":
    main()
