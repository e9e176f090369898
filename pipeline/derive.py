"""Derived physiology per sample (the ``derived`` table), for the samples in scope."""

from __future__ import annotations

import duckdb

from pipeline.config import SiteConfig
from pipeline.rules import Catalogue
from pipeline.sql_files import run_sql


def derive(con: duckdb.DuckDBPyConnection, catalogue: Catalogue, config: SiteConfig) -> None:
    """Recompute derived metrics for ``scope_samples`` from the catalogue's [derive] definitions."""
    run_sql(
        con,
        "derive/10_derived.sql",
        site_pb_mmhg=config.barometric_pressure_mmhg,
        site_altitude_m=config.altitude_m,
        **catalogue.derive,
    )
