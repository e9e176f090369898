"""The demo: invented exports from the demo generator, a site configuration, one run.

Everything in the demo folder describes the invented Saltmarsh Valley Hospital; no real
patient is in it.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

from pipeline.log import Log
from pipeline.sql_files import SQL_DIR

PROFILES_DIR = SQL_DIR.parent / "profiles"
SITE_TEMPLATE = """\
# Site configuration written by `abg-audit demo` for the invented Saltmarsh Valley Hospital.
[site]
name = "Saltmarsh Valley Hospital (invented demo data)"
altitude_m = {altitude_m}

[store]
path = "store/abg_audit.duckdb"
keep_patient_id = true

[output]
folder = "output"

[privacy]
key_file = "secrets/pseudonym.key"   # outside the store folder, as for a real site
small_cell_threshold = 11
internal_small_cell_threshold = 5  # the hospital's own meetings see smaller cells (output/internal/)

[audit]
period = "week"                 # two months of demo data: weekly points fill the control charts

[[inputs]]
path = "exports/us_style"
profile = "{profiles}/demo_us_style.toml"
pattern = "*.csv"

[[inputs]]
path = "exports/eu_style"
profile = "{profiles}/demo_eu_style.toml"
pattern = "*.csv"

[[inputs]]
path = "exports/parquet"
profile = "{profiles}/demo_parquet.toml"
pattern = "*.parquet"

[[inputs]]
path = "exports/fhir"
profile = "{profiles}/demo_fhir.toml"
pattern = "*.ndjson"

[[inputs]]
path = "exports/hl7v2"
profile = "{profiles}/demo_hl7v2.toml"
pattern = "*.hl7"

[[inputs]]
kind = "prescriptions"
path = "exports/prescriptions"
profile = "{profiles}/demo_prescriptions.toml"
pattern = "*.csv"

# Each unit's type, from the demo generator's unit table (synthetic_data.hospital.UNIT_TYPES).
[unit_types]
{unit_types}
"""


def prepare_demo(workdir: Path, *, rows: int, seed: int, log: Log) -> Path:
    """Generate the demo exports (once per rows/seed) and write the site configuration; return its path."""
    from synthetic_data import GENERATOR_VERSION, generate_demo
    from synthetic_data.hospital import SITE_ALTITUDE_M, UNIT_TYPES
    from synthetic_data.writers import write_exports

    workdir.mkdir(parents=True, exist_ok=True)
    exports = workdir / "exports"
    # the generator's version too: exports from an older generator are made again
    marker = exports / f".generated-{rows}-{seed}-{GENERATOR_VERSION}"
    if not marker.exists():
        # Other demo data: start over, or the old store would read the new exports as corrections.
        for stale in (exports, workdir / "store", workdir / "output"):
            if stale.exists():
                log.info(f"removing the previous demo's {stale.name} folder")
                shutil.rmtree(stale)
        log.info(f"generating {rows} invented samples (seed {seed}) into {exports}")
        demo = generate_demo(rows, seed)
        write_exports(
            demo.records,
            demo.faults,
            exports,
            provenance={"rows": rows, "seed": seed},
            lookalikes=demo.lookalikes,
            prescriptions=demo.prescriptions,
            oxygen=demo.oxygen,
            feeds=True,
        )
        marker.touch()
    else:
        log.info(f"demo exports for {rows} samples (seed {seed}) already in {exports}")
    config = workdir / "site.toml"
    config.write_text(
        SITE_TEMPLATE.format(
            altitude_m=SITE_ALTITUDE_M,
            profiles=Path(os.path.relpath(PROFILES_DIR, workdir.resolve())).as_posix(),
            unit_types="\n".join(f"{json.dumps(unit)} = {json.dumps(kind)}" for unit, kind in UNIT_TYPES.items()),
        ),
        encoding="utf-8",
    )
    return config
