"""Audit tables and outputs for each audience: the hospital's own meetings (when the site sets
an internal small-cell threshold) and publication.

The store keeps the publication tables: they are built last. Each audience gets its own
folder (pipeline/audience.py), so an internal file is never mistaken for one fit to leave the
hospital.
"""

from __future__ import annotations

from pathlib import Path

import duckdb

from pipeline.audience import audiences
from pipeline.audit import build_audit
from pipeline.config import SiteConfig
from pipeline.log import Log
from pipeline.rules import Catalogue


def build_and_write(
    con: duckdb.DuckDBPyConnection,
    config: SiteConfig,
    catalogue: Catalogue,
    run_id: str,
    log: Log,
    *,
    incremental: bool = False,
) -> list[Path]:
    """Build the audit tables with each audience's threshold and write its outputs; return the files."""
    from pipeline.report import write_outputs  # the report module calls back here for `abg-audit report`

    written: list[Path] = []
    for audience in audiences(config):
        log.progress(f"building audit tables for {audience.name} (counts from {audience.threshold} shown)")
        build_audit(con, config, catalogue, run_id, incremental=incremental, threshold=audience.threshold)
        log.progress(f"writing outputs for {audience.name}")
        written += write_outputs(con, config, run_id, log, audience=audience)
    return written
