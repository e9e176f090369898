"""A multi-site demo lake: invented hospitals from the demo generator, one seed each.

Each site's records are the generator's canonical records (its injected faults and clinical
look-alikes come with them), put into an in-memory store with keyed pseudonyms as ingestion
makes them, and published with ``publish_lake`` exactly as a real site publishes. The exports'
own faults (bad dates, unknown codes, ...) are not part of it: those rows would be quarantined at
the site and never reach the lake. Every name and number is invented.
"""

from __future__ import annotations

import hashlib
import tempfile
from dataclasses import dataclass
from pathlib import Path

import duckdb
import polars as pl

from pipeline.network.lake import SiteSettings, publish_lake
from pipeline.pseudonym import add_pseudonym
from pipeline.schema import PSEUDONYMISED
from pipeline.store import open_scratch_store
from synthetic_data import DemoData


@dataclass(frozen=True)
class DemoSite:
    site: str
    name: str
    altitude_m: float


# Invented hospitals of an invented regional network (altitudes differ so the site pressure matters).
DEMO_SITES = (
    DemoSite("saltmarsh", "Saltmarsh Valley Hospital (invented)", 35.0),
    DemoSite("kestrel-bay", "Kestrel Bay General (invented)", 12.0),
    DemoSite("larch-moor", "Larch Moor Infirmary (invented)", 410.0),
    DemoSite("fenwick-downs", "Fenwick Downs Hospital (invented)", 1250.0),
    DemoSite("otter-creek", "Otter Creek Community Hospital (invented)", 95.0),
    DemoSite("pinecrest", "Pinecrest Vale Hospital (invented)", 620.0),
)
PRESCRIPTION_COLUMNS = (
    "prescription_id patient_id encounter_id unit start_at end_at target_spo2_low_pct target_spo2_high_pct "
    "o2_device o2_flow_l_min fio2 prescriber_role"
).split()


def demo_unit_targets() -> list[tuple[str, str, float | None, float | None, bool]]:
    """The demo units' types with the default targets, as SiteConfig.unit_target_rows gives them."""
    from pipeline.config import SiteConfig
    from synthetic_data.hospital import UNIT_TYPES

    config = SiteConfig(None, "demo", Path("."), Path("."), None, (), unit_types=dict(UNIT_TYPES))
    return config.unit_target_rows()


def demo_key(site: str) -> bytes:
    """The demo site's pseudonym key (per site, as the network key policy's default). Demo only:
    a real site's key is random and secret (README, "The pseudonym key")."""
    return hashlib.sha256(f"invented demo network site {site}".encode()).hexdigest().encode()


def build_demo_lake(lake: Path, *, sites: int = 5, rows_per_site: int = 2_000, seed: int = 101) -> list[dict]:
    """Write ``sites`` invented sites (``rows_per_site`` samples each) into ``lake``; return the manifests."""
    from synthetic_data import generate_demo

    if not 1 <= sites <= len(DEMO_SITES):
        raise ValueError(f"the demo network has 1 to {len(DEMO_SITES)} sites")
    manifests = []
    for number, demo_site in enumerate(DEMO_SITES[:sites]):
        demo = generate_demo(rows_per_site, seed + number)
        key = demo_key(demo_site.site)
        settings = SiteSettings(
            site=demo_site.site,
            site_name=demo_site.name,
            barometric_pressure_mmhg=None,
            altitude_m=demo_site.altitude_m,
            unit_targets=demo_unit_targets(),
        )
        with tempfile.TemporaryDirectory(prefix="abg-demo-lake-") as spill:
            con = open_scratch_store(Path(spill) / "spill")
            try:
                store_demo_site(con, demo, key, demo_site.site)
                manifests.append(publish_lake(con, settings, key, lake))
            finally:
                con.close()
    return manifests


def store_demo_site(con: duckdb.DuckDBPyConnection, demo: DemoData, key: bytes, site: str) -> None:
    """The generator's records and (fault-free) prescriptions into a store's tables, with keyed
    pseudonyms made as ingestion makes them (the raw identifiers kept, as a site keeping them does)."""
    records = _with_keys(demo.records, key)
    prescriptions = demo.prescriptions.filter(pl.col("export_fault").is_null()).select(PRESCRIPTION_COLUMNS)
    _insert(con, "records", records, site)
    _insert(con, "prescriptions", _with_keys(prescriptions, key), site)


def _with_keys(frame: pl.DataFrame, key: bytes) -> pl.DataFrame:
    for column, (output, domain) in PSEUDONYMISED.items():
        if column in frame.columns:
            frame = add_pseudonym(frame, key, column, output, domain)
    return frame


def _insert(con: duckdb.DuckDBPyConnection, table: str, frame: pl.DataFrame, site: str) -> None:
    con.register("demo_frame", frame)
    try:
        con.execute(
            f"insert into {table} by name select *, 'demo-{site}' as run_id, 1 as version, "
            "'generated' as source_file from demo_frame"
        )
    finally:
        con.unregister("demo_frame")


def main(argv: list[str] | None = None) -> None:
    """``python -m pipeline.network.demo_lake --to DIR [--sites 5] [--rows 2000] [--seed 101]``"""
    import argparse

    parser = argparse.ArgumentParser(description="Write a lake of invented hospitals (demo data only).")
    parser.add_argument("--to", type=Path, required=True, help="lake folder")
    parser.add_argument("--sites", type=int, default=5)
    parser.add_argument("--rows", type=int, default=2_000, help="samples per site")
    parser.add_argument("--seed", type=int, default=101)
    args = parser.parse_args(argv)
    for manifest in build_demo_lake(args.to, sites=args.sites, rows_per_site=args.rows, seed=args.seed):
        rows = ", ".join(f"{table} {entry['rows']}" for table, entry in manifest["tables"].items())
        print(f"{manifest['site']}: {rows}")


if __name__ == "__main__":
    main()
