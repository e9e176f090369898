"""The network run's publication: each site's audit tables and report, and the network's report.

The per-sample work (derive, rules, the aggregate layer) runs on the network engine; what the
audit tables are built from is small (unit x period counts, analyser checks), so it comes back
here, one site at a time, into a local DuckDB, and the site's own publication code builds and
writes it: ``pipeline.audit.build_audit`` (windows, rates with Wilson intervals, small-cell
suppression, control charts, funnel plots, the review worklist) with the layer taken as the
engine made it, then ``pipeline.report.write_outputs`` (tables, workbook, HTML report). No
formula, suppression step or template is repeated here.

What each site's folder holds is what the site's own run publishes from the same records
(tests/test_network_translate.py), except the file reconciliation, which is about the site's
exports and stays with the site (the lake holds no file events: that table is empty here). The
review worklist (row level, restricted) names samples by their lake pseudonyms, which only the
site, holding its key, can trace to accession numbers.

Output, under ``<output>/published/``:
  sites/<site>/         the site's outputs as its own run writes them (tables/, workbook, report,
                        restricted/ for the worklist);
  tables/<table>.*      every published table of every site, with a ``site`` column first;
  network_report.html   one page: each question's whole-window figures, a row per site, each
                        cell as the site's report shows it, with a link to that report.
"""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import duckdb
import jinja2
import polars as pl

from pipeline import __version__
from pipeline.audience import Audience, publication
from pipeline.audit import PUBLISHED_TABLES, build_audit
from pipeline.audit_settings import AuditSettings
from pipeline.config import OxygenTarget, SiteConfig
from pipeline.log import Log
from pipeline.report import (
    CAUTION,
    LIMITS,
    REPORT_NAME,
    RESTRICTED_DIR,
    TABLES_DIR,
    TEMPLATES,
    _about,
    _write_table,
    answer_tables,
    atomic_write,
    cell,
    rate_block,
    rate_with_counts,
    write_outputs,
)
from pipeline.rules import Catalogue
from pipeline.store import open_scratch_store

PUBLISHED_DIR = "published"
SITES_DIR = "sites"
NETWORK_REPORT = "network_report.html"
TEMPLATE = TEMPLATES / "network_report.html.j2"
# The engine's outputs the site's audit stage reads: the aggregate layer and the analyser checks
# (small; copied in), and the row-level tables the review worklist reads (views on the Parquet).
LAYER_INPUTS = (
    "audit_unit_period_counts",
    "audit_unit_period_flags",
    "audit_unit_period_patients",
    "audit_unit_period_age_bands",
    "audit_unit_period_episodes",
    "analyser_qc",
)
ROW_INPUTS = ("derived", "flags", "audit_status")


@dataclass(frozen=True)
class NetworkSettings:
    """What every site's publication shares in a network: the audit settings, the small-cell
    threshold and the rule thresholds (so sites are compared like with like)."""

    audit: AuditSettings = field(default_factory=AuditSettings)
    small_cell_threshold: int = 11
    thresholds: dict[str, Any] = field(default_factory=dict)


@dataclass
class SitePublication:
    site: str
    folder: Path
    tables: dict[str, pl.DataFrame]
    worklist_rows: int


def site_config(site: str, settings: dict[str, Any], network: NetworkSettings, folder: Path) -> SiteConfig:
    """The site as its publication code needs it: its lake label as its name (the label is what
    crosses the site boundary), its units' types and targets from its manifest, the network's
    audit settings and thresholds."""
    unit_types: dict[str, str] = {}
    targets: dict[str, OxygenTarget] = {}
    for unit, unit_type, low, high, assessed in settings["unit_targets"]:
        unit_types[unit] = unit_type
        targets[unit_type] = OxygenTarget(low_pct=low, high_pct=high, assessed=assessed)
    return SiteConfig(
        path=None,
        site_name=site,
        store_path=folder / "no-store",
        output_folder=folder,
        key_file=None,
        inputs=(),
        altitude_m=settings.get("altitude_m"),
        barometric_pressure_mmhg=settings.get("barometric_pressure_mmhg"),
        small_cell_threshold=network.small_cell_threshold,
        thresholds=dict(network.thresholds),
        audit=network.audit,
        unit_types=unit_types,
        oxygen_targets=targets,
    )


def _paths_sql(paths: list[Path]) -> str:
    quoted = ", ".join("'" + str(p).replace("'", "''") + "'" for p in paths)
    return f"read_parquet([{quoted}], union_by_name = true, hive_partitioning = false)"


def _site_inputs(
    con: duckdb.DuckDBPyConnection,
    site: str,
    lake: Path,
    manifest: dict[str, Any],
    output: Path,
    empty: Callable[[str], pl.DataFrame],
) -> None:
    """The site's records (the lake's files, read in place) and the engine's outputs for the site."""
    records = [(lake / f["path"]).resolve() for f in manifest["files"] if f["table"] == "records"]
    con.execute("drop table records")
    con.execute(f"create view records as select * from {_paths_sql(records)}")
    for table in (*ROW_INPUTS, *LAYER_INPUTS):
        kind = "view" if table in ROW_INPUTS else "table"
        con.execute(f"drop table if exists {table}")
        files = sorted((output / table / f"site={site}").glob("*.parquet"))
        if files:
            con.execute(f"create {kind} {table} as select * from {_paths_sql(files)}")
        else:  # the engine made no row of this table for the site: its columns, no rows
            con.register("empty_frame", empty(table))
            con.execute(f"create table {table} as select * from empty_frame")
            con.unregister("empty_frame")


def publish_site(
    site: str,
    manifest: dict[str, Any],
    lake: Path,
    output: Path,
    empty: Callable[[str], pl.DataFrame],
    catalogue: Catalogue,
    network: NetworkSettings,
    run: dict[str, Any],
    log: Log,
) -> SitePublication:
    """Build and write one site's published tables and report from the engine's outputs."""
    folder = output / PUBLISHED_DIR / SITES_DIR / site
    config = site_config(site, manifest["settings"], network, folder)
    spill = Path(tempfile.mkdtemp(prefix="abg-network-publish-"))
    con = open_scratch_store(spill)
    try:
        _site_inputs(con, site, lake, manifest, output, empty)
        con.execute(
            "insert into runs (run_id, command, started_at, finished_at, outcome, code_version, summary) "
            "values (?, 'network', ?, ?, 'succeeded', ?, ?)",
            [run["run_id"], run["started_at"], run["finished_at"], __version__, run["summary"]],
        )
        build_audit(con, config, catalogue, run["run_id"], build_layer=False)
        write_outputs(con, config, run["run_id"], log, audience=publication(config))
        tables = {name: con.sql(f"select * from {name}").pl() for name in PUBLISHED_TABLES}
        worklist = con.execute("select count(*) from review_worklist").fetchall()[0][0]
    finally:
        con.close()
        shutil.rmtree(spill, ignore_errors=True)
    return SitePublication(site, folder, tables, worklist)


def with_site(site: str, frame: pl.DataFrame) -> pl.DataFrame:
    return frame.select(pl.lit(site, dtype=pl.String).alias("site"), *frame.columns)


def network_config(sites: list[str], network: NetworkSettings, folder: Path) -> SiteConfig:
    settings = {"unit_targets": [], "altitude_m": None, "barometric_pressure_mmhg": None}
    return site_config(f"network of {len(sites)} sites ({', '.join(sites)})", settings, network, folder)


def write_network_tables(
    publications: list[SitePublication], network: NetworkSettings, run_id: str, folder: Path
) -> list[Path]:
    """Every published table of every site in one file per table, a ``site`` column first."""
    config = network_config([p.site for p in publications], network, folder)
    about = _about(config, run_id, publication(config))
    written: list[Path] = []
    for name in PUBLISHED_TABLES:
        frames = [with_site(p.site, p.tables[name]) for p in publications]
        frame = pl.concat(frames, how="diagonal_relaxed") if frames else pl.DataFrame()
        written += _write_table(frame, folder / TABLES_DIR, name, about, 0o640)
    return written


def _site_rows(question: str, publications: list[SitePublication]) -> tuple[list[dict[str, Any]], list[dict]]:
    """One question's measures (in the first site's order, then any others) and, per site, its
    whole-site cells as its own report shows them."""
    measures: list[dict[str, Any]] = []
    per_site: list[tuple[str, dict[str, dict[str, Any]]]] = []
    for p in publications:
        answers = {q["key"]: q for q in answer_tables(p.tables["audit_rates"])}
        q = answers.get(question)
        cells: dict[str, dict[str, Any]] = {}
        if q is not None:
            for m in q["measures"]:
                if m["measure"] not in {x["measure"] for x in measures}:
                    measures.append(m)
            if q["site"] is not None:
                cells = {m["measure"]: c for m, c in zip(q["measures"], q["site"]["cells"], strict=True) if c}
        per_site.append((p.site, cells))
    rows = [{"site": site, "cells": [cells.get(m["measure"]) for m in measures]} for site, cells in per_site]
    return measures, rows


def render_network_report(
    publications: list[SitePublication], network: NetworkSettings, run: dict[str, Any], folder: Path
) -> str:
    """One page over the network: a row per site in every question's table, each cell the whole-site
    figure of the site's own (suppressed) tables, and a link to the site's full report."""
    config = network_config([p.site for p in publications], network, folder)
    audience: Audience = publication(config)
    k = network.small_cell_threshold
    seen: list[str] = []
    titles: dict[str, tuple[str, str]] = {}
    for p in publications:
        for q in answer_tables(p.tables["audit_rates"]):
            if q["key"] not in seen:
                seen.append(q["key"])
                titles[q["key"]] = (q["title"], q["ask"])
    questions = []
    for key in seen:
        measures, rows = _site_rows(key, publications)
        questions.append(
            {"key": key, "title": titles[key][0], "ask": titles[key][1], "measures": measures, "rows": rows}
        )
    sites = []
    for p in publications:
        volume = p.tables["audit_volume"].filter(pl.col("all_units") & pl.col("all_periods"))
        if "unit_type" in volume.columns:
            volume = volume.filter(pl.col("unit_type").is_null())
        window = p.tables["audit_rates"].filter(~pl.col("all_periods")).select("period").unique().sort("period")
        periods = window["period"].to_list()
        sites.append(
            {
                "site": p.site,
                "total": volume.to_dicts()[0] if volume.height else None,
                "window": f"{periods[0]} to {periods[-1]}" if periods else None,
                "report": f"{SITES_DIR}/{p.site}/{REPORT_NAME}",
                "worklist": f"{SITES_DIR}/{p.site}/{RESTRICTED_DIR}/review_worklist.csv",
            }
        )
    flag_rules: list[dict[str, Any]] = []
    for p in publications:
        catalogue = p.tables["rule_catalogue"].filter(pl.col("kind").is_in(["data_quality", "documentation"]))
        for rule in catalogue.sort("kind", "rule_id").to_dicts():
            if rule["rule_id"] not in {r["rule_id"] for r in flag_rules}:
                flag_rules.append(rule)
    flag_matrix = []
    for rule in flag_rules:
        cells = []
        for p in publications:
            rows = p.tables["audit_flag_rates"].filter(
                pl.col("all_periods") & pl.col("all_units") & (pl.col("rule_id") == rule["rule_id"])
            )
            if "unit_type" in rows.columns:
                rows = rows.filter(pl.col("unit_type").is_null())
            cells.append(rows.to_dicts()[0] if rows.height else None)
        flag_matrix.append({"rule": rule, "cells": cells})
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATE.parent),
        autoescape=jinja2.select_autoescape(["html", "j2"], default_for_string=True),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.globals.update(cell=cell, rate_block=rate_block, rate_with_counts=rate_with_counts)
    return env.get_template(TEMPLATE.name).render(
        caution=CAUTION,
        limits=LIMITS,
        audience=audience,
        k=k,
        run=run,
        version=__version__,
        generated_at=datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
        settings=network.audit,
        sites=sites,
        questions=questions,
        flag_matrix=flag_matrix,
    )


def publish_network(
    lake: Path,
    manifests: list[dict[str, Any]],
    output: Path,
    empty: Callable[[str], pl.DataFrame],
    catalogue: Catalogue,
    network: NetworkSettings,
    run: dict[str, Any],
    log: Log,
) -> list[SitePublication]:
    """Every site's publication, the network's tables with a site column, and the network report."""
    folder = output / PUBLISHED_DIR
    if folder.exists():  # the previous run's, sites that have left the lake included
        shutil.rmtree(folder)
    publications = [publish_site(m["site"], m, lake, output, empty, catalogue, network, run, log) for m in manifests]
    write_network_tables(publications, network, run["run_id"], folder)
    html = render_network_report(publications, network, run, folder)
    atomic_write(folder / NETWORK_REPORT, lambda tmp: tmp.write_text(html, encoding="utf-8"), 0o640)
    return publications
