"""Derived physiology per sample (the ``derived`` table), for the samples in scope."""

from __future__ import annotations

import duckdb
import polars as pl

from pipeline.config import SiteConfig
from pipeline.rules import Catalogue
from pipeline.sql_files import run_sql

_UNIT_TARGET_SCHEMA = {
    "unit": pl.String,
    "unit_type": pl.String,
    "target_low_pct": pl.Float64,
    "target_high_pct": pl.Float64,
    "assessed": pl.Boolean,
}


def store_unit_targets(con: duckdb.DuckDBPyConnection, config: SiteConfig) -> None:
    """The site's unit types and their saturation targets as temp table ``unit_oxygen_targets``."""
    frame = pl.DataFrame(config.unit_target_rows(), schema=_UNIT_TARGET_SCHEMA, orient="row")
    con.register("unit_target_frame", frame)
    try:
        con.execute("create or replace temp table unit_oxygen_targets as select * from unit_target_frame")
    finally:
        con.unregister("unit_target_frame")


def derive(con: duckdb.DuckDBPyConnection, catalogue: Catalogue, config: SiteConfig) -> None:
    """Recompute derived metrics for ``scope_samples`` from the catalogue's [derive] definitions.

    A rebuild recreates the table, so a release that adds a derived column needs nothing more
    than the re-check its changed stage SQL triggers (pipeline.run.analysis_sha256)."""
    if con.execute("select rebuild from scope_settings").fetchall()[0][0]:
        con.execute("drop table if exists derived")
    store_unit_targets(con, config)
    run_sql(con, "derive/05_prescription_link.sql")
    run_sql(
        con,
        "derive/10_derived.sql",
        site_pb_mmhg=config.barometric_pressure_mmhg,
        site_altitude_m=config.altitude_m,
        **catalogue.derive,
    )
