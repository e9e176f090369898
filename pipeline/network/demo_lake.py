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


def demo_key(site: str) -> bytes:
    """The demo site's pseudonym key (per site, as the network key policy's default). Demo only:
    a real site's key is random and secret (README, "The pseudonym key")."""
    return hashlib.sha256(f"invented demo network site {site}".encode()).hexdigest().encode()


def build_demo_lake(lake: Path, *, sites: int = 5, rows_per_site: int = 2_000, seed: int = 101) -> list[dict]:
    """Write ``sites`` invented sites (``rows_per_site`` samples each) into ``lake``; return the manifests."""
    from synthetic_data import generate_demo
    from synthetic_data.hospital import UNIT_TYPES

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
            unit_targets=[(unit, kind, None, None, kind not in ("paediatric", "neonatal")) for unit, kind in
                          sorted(UNIT_TYPES.items())],
        )
        records = _with_keys(demo.records, key)
        prescriptions = demo.prescriptions.filter(pl.col("export_fault").is_null()).select(PRESCRIPTION_COLUMNS)
        prescriptions = _with_keys(prescriptions, key)
        with tempfile.TemporaryDirectory(prefix="abg-demo-lake-") as spill:
            con = open_scratch_store(Path(spill) / "spill")
            try:
                _insert(con, "records", records, demo_site.site)
                _insert(con, "prescriptions", prescriptions, demo_site.site)
                manifests.append(publish_lake(con, settings, key, lake))
            finally:
                con.close()
    return manifests


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
