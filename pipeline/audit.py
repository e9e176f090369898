"""The audit stage: unit x period tables, control charts, funnel plots and the review worklist.

Every table is built by a SQL file in ``sql/audit/`` (one relation per file) inside one
transaction, so analysts reading the store see either the previous night's tables or the
new ones, never a mix. Counts come from a persistent aggregate layer (per sample facts and
per unit and period counts, ``02_audit_layer_update.sql``) that a nightly run updates for
its own samples only; every later step reads those small tables, so the stage costs what
the new data touches, not what the store holds. Counts pass through ``audit_cell``, where small counts are hidden
(primary suppression) and then, step by step, one more cell in every line that would let
a hidden count be recovered from a total (complementary suppression), and one more cell
wherever several totals together would still give a hidden count away (found by linear
algebra over the lines' sums), before any published table reads them.
"""

from __future__ import annotations

import hashlib
import json

import duckdb
import numpy as np
from threadpoolctl import threadpool_limits

from pipeline.config import SiteConfig
from pipeline.errors import StorageError
from pipeline.rules import Catalogue, store_catalogue
from pipeline.sql_files import read_sql, run_sql

# The persistent aggregate layer: reset (full rebuild) or scope (this run's samples), then update.
_LAYER_RESET = "audit/01_audit_layer_reset.sql"
_LAYER_SCOPE = "audit/01_audit_layer_scope.sql"
_LAYER_UPDATE = "audit/02_audit_layer_update.sql"
LAYER_TABLES = (
    "audit_sample_fact",
    "audit_sample_flag",
    "audit_unit_period_counts",
    "audit_unit_period_flags",
    "audit_unit_period_patients",
    "audit_unit_period_episodes",
    "audit_unit_period_age_bands",
    "audit_episode",
    "audit_layer_runs",
    "audit_layer_state",
)
# Build order; each file creates one relation (12_... is the repeated suppression step).
_WORK_FILES = (
    "audit/08_audit_window.sql",
    "audit/05_audit_measure.sql",
    "audit/06_audit_age_band_family.sql",
    "audit/06_audit_partition.sql",
    "audit/07_audit_pair.sql",
    "audit/10_audit_cell.sql",
    "audit/11_audit_line.sql",
)
_STEP_FILE = "audit/12_audit_complementary_step.sql"
_DETERMINED_STEP_FILE = "audit/12_audit_determined_step.sql"
_PUBLISH_FILES = (
    "audit/13_audit_period.sql",
    "audit/20_audit_volume.sql",
    "audit/21_audit_rates.sql",
    "audit/22_audit_pf_bands.sql",
    "audit/23_audit_flag_rates.sql",
    "audit/24_audit_age_groups.sql",
    "audit/25_audit_age_band_rates.sql",
    "audit/30_audit_control_chart.sql",
    "audit/40_audit_funnel.sql",
    "audit/41_audit_funnel_curve.sql",
    "audit/50_review_worklist.sql",
    "audit/60_audit_analyser_qc.sql",
    "audit/70_audit_run_reconciliation.sql",
)
_TEMP_TABLES = (
    "audit_window",
    "audit_measure",
    "audit_age_band_family",
    "audit_age_band_rate",
    "audit_partition",
    "audit_pair",
    "audit_cell",
    "audit_line",
    "audit_period",
    "audit_determined",
)

# Aggregate tables fit for people without access to row-level data (small cells suppressed).
PUBLISHED_TABLES = (
    "audit_volume",
    "audit_rates",
    "audit_pf_bands",
    "audit_flag_rates",
    "audit_age_groups",
    "audit_age_band_rates",
    "audit_control_chart",
    "audit_funnel",
    "audit_funnel_curve",
    "audit_analyser_qc",
    "audit_run_reconciliation",
    "rule_catalogue",
)
# Row-level tables for the laboratory only: pseudonymised, but with accession numbers.
RESTRICTED_TABLES = ("review_worklist",)
_NEEDED = ("records", "derived", "flags", "audit_status", "analyser_qc", "file_events")
MAX_SUPPRESSION_STEPS = 1000


def audit_parameters(config: SiteConfig, catalogue: Catalogue, run_id: str) -> dict[str, object]:
    """The named parameters of the ``sql/audit`` files."""
    settings = config.audit
    return {
        "period": settings.period,
        "history_periods": settings.history_periods,
        "complete_periods_only": settings.complete_periods_only,
        "k": config.small_cell_threshold,
        "sigma": settings.sigma,
        "shift_run": settings.shift_run,
        "trend_run": settings.trend_run,
        "chart_limits": settings.chart_limits,
        "funnel_overdispersion": settings.funnel_overdispersion,
        "winsorize_pct": settings.winsorize_pct,
        "run_id": run_id,
        "worklist_days": settings.worklist_days,
        "hypoxaemia_pao2_mmhg": catalogue.derive["hypoxaemia_pao2_mmhg"],
        "hypoxaemia_sat_pct": catalogue.derive["hypoxaemia_sat_pct"],
        "hyperoxaemia_pao2_mmhg": catalogue.derive["hyperoxaemia_pao2_mmhg"],
    }


def store_unit_types(con: duckdb.DuckDBPyConnection, config: SiteConfig) -> None:
    """The site's unit types (``[unit_types]``) as table ``site_unit_types``, read by the audit
    cells: units are compared with the units of their own type."""
    con.execute("create or replace table site_unit_types (unit varchar, unit_type varchar)")
    if config.unit_types:
        con.executemany("insert into site_unit_types values (?, ?)", sorted(config.unit_types.items()))


def _existing_tables(con: duckdb.DuckDBPyConnection) -> set[str]:
    rows = con.execute("select table_name from information_schema.tables where table_schema = 'main'").fetchall()
    return {r[0] for r in rows}


def suppress_complementary(con: duckdb.DuckDBPyConnection) -> int:
    """Repeat the complementary step until no line has exactly one hidden cell; return the steps taken."""
    statement = con.extract_statements(read_sql(_STEP_FILE))[0]
    for step in range(1, MAX_SUPPRESSION_STEPS + 1):
        changed = con.execute(statement.query).fetchall()[0][0]
        if changed == 0:
            return step
    raise RuntimeError(f"complementary suppression did not settle in {MAX_SUPPRESSION_STEPS} steps")


def determined_cells(con: duckdb.DuckDBPyConnection) -> dict[int, list[int]]:
    """The hidden cells of ``audit_cell`` whose value follows exactly from the shown cells and the sums of
    ``audit_line`` taken together, each with the hidden cells of its block (those linked to it by lines).

    Each line says total - sum(parts) = 0; with the shown cells moved to the right-hand side it is one
    equation in the hidden cells. A hidden cell is determined when every solution of the homogeneous system
    gives it the same value, that is when its coordinate is zero in every null-space vector (equivalently, its
    unit vector lies in the row space of the system). Cells linked by
    no line fall into independent blocks, solved one at a time (singular value decomposition, numpy).
    """
    members = con.execute(
        "select l.line_id, l.cell_id, l.is_total from audit_line as l "
        "join audit_cell as c on c.cell_id = l.cell_id where c.hidden order by l.line_id, l.cell_id"
    ).fetchall()
    equations: dict[int, list[tuple[int, float]]] = {}
    for line_id, cell_id, is_total in members:
        equations.setdefault(line_id, []).append((cell_id, 1.0 if is_total else -1.0))
    parent: dict[int, int] = {}

    def root(cell: int) -> int:
        parent.setdefault(cell, cell)
        while parent[cell] != cell:
            parent[cell] = parent[parent[cell]]
            cell = parent[cell]
        return cell

    for terms in equations.values():
        first = root(terms[0][0])
        for cell, _ in terms[1:]:
            parent[root(cell)] = first
    blocks: dict[int, list[list[tuple[int, float]]]] = {}
    for terms in equations.values():
        blocks.setdefault(root(terms[0][0]), []).append(terms)
    determined: dict[int, list[int]] = {}
    # Each block is small: a multi-threaded BLAS only adds hand-over cost, and on a busy machine its
    # spinning threads made this step twenty times slower (measured: 19 s against 1 s on two cores).
    with threadpool_limits(limits=1, user_api="blas"):
        for block in blocks.values():
            _determined_in_block(block, determined)
    return determined


def _determined_in_block(block: list[list[tuple[int, float]]], determined: dict[int, list[int]]) -> None:
    """Add the determined cells of one block of linked hidden cells to ``determined``."""
    cells = sorted({cell for terms in block for cell, _ in terms})
    column = {cell: j for j, cell in enumerate(cells)}
    matrix = np.zeros((len(block), len(cells)))
    for row, terms in enumerate(block):
        for cell, coefficient in terms:
            matrix[row, column[cell]] += coefficient
    # e_j lies in the row space exactly when its coordinate is zero in every null-space vector; the
    # economy decomposition gives an orthonormal basis of the row space, and the squared norm of e_j's
    # projection on it is 1 - (its squared coordinates in the null space).
    _, singular, vt = np.linalg.svd(matrix, full_matrices=False)
    rank = int((singular > 1e-9 * max(float(singular.max(initial=0.0)), 1.0)).sum())
    outside_row_space = 1.0 - np.square(vt[:rank]).sum(axis=0)
    for cell in cells:
        if float(outside_row_space[column[cell]]) < 1e-12:
            determined[cell] = cells


def suppress_determined(con: duckdb.DuckDBPyConnection) -> int:
    """Hide one more cell beside every hidden cell that several sums together give away, repeat the
    complementary step, and search again until no hidden cell is determined; return the rounds taken.

    When every line of a determined cell is hidden throughout, the partner is sought in the lines of the
    other hidden cells of its block; when those too are hidden throughout, no shown count is left to give
    anything away, and the search stops.
    """
    statement = con.extract_statements(read_sql(_DETERMINED_STEP_FILE))[0]
    con.execute("create or replace temp table audit_determined (cell_id bigint)")
    for step in range(1, MAX_SUPPRESSION_STEPS + 1):
        determined = determined_cells(con)
        if not determined:
            return step
        changed = 0
        for cells in (sorted(determined), sorted({c for block in determined.values() for c in block})):
            con.execute("delete from audit_determined")
            con.executemany("insert into audit_determined values (?)", [[cell] for cell in cells])
            changed = con.execute(statement.query).fetchall()[0][0]
            if changed:
                break
        if not changed:
            return step
        suppress_complementary(con)
    raise RuntimeError(f"suppression against combined sums did not settle in {MAX_SUPPRESSION_STEPS} steps")


def layer_sha256(config: SiteConfig) -> str:
    """What the persistent layer's rows depend on besides the store: the reporting period and
    the layer's SQL. A different value means the layer is rebuilt from every record."""
    basis = {"period": config.audit.period, "sql": [read_sql(p) for p in (_LAYER_RESET, _LAYER_SCOPE, _LAYER_UPDATE)]}
    return hashlib.sha256(json.dumps(basis, sort_keys=True).encode()).hexdigest()


def _layer_current(con: duckdb.DuckDBPyConnection, sha256: str, *, with_scope: bool = False) -> bool:
    """True when the layer holds every analysed run except this run's scope (``with_scope``:
    this run's scope too, as after the first audience's build), with these settings."""
    tables = _existing_tables(con)
    if any(t not in tables for t in LAYER_TABLES):
        return False
    temporary = {r[0] for r in con.execute("select table_name from duckdb_tables() where temporary").fetchall()}
    if not {"scope_samples", "scope_runs"} <= temporary:
        return False
    state = con.execute("select settings_sha256 from audit_layer_state").fetchall()
    if state != [(sha256,)]:
        return False
    missing = con.execute(
        "select count(*) from runs where analysed_at is not null "
        "and run_id not in (select run_id from audit_layer_runs)"
        + ("" if with_scope else " and run_id not in (select run_id from scope_runs)")
    ).fetchall()[0][0]
    return missing == 0


def build_audit(
    con: duckdb.DuckDBPyConnection,
    config: SiteConfig,
    catalogue: Catalogue,
    run_id: str,
    *,
    incremental: bool = False,
    threshold: int | None = None,
    build_layer: bool = True,
) -> bool:
    """Rebuild every audit table in one transaction (the new tables replace the old at commit).

    With ``incremental`` (a nightly run, after ``analyse``), the aggregate layer is updated
    for ``scope_samples`` only, when it is current: same period setting and layer SQL, and
    every earlier analysed run folded in. Otherwise, and by default, the layer is rebuilt from
    every record. ``threshold`` replaces the site's small-cell threshold (the internal
    audience, pipeline/audience.py). With ``build_layer`` false the layer tables are taken as they
    are (the network run computes them on its engine and brings each site's back,
    pipeline/network/publish.py). Returns True when the layer was updated incrementally.
    """
    missing = [t for t in _NEEDED if t not in _existing_tables(con)]
    if missing:
        raise StorageError(
            f"the store has no analysed records yet (missing {', '.join(missing)}); run the pipeline first"
        )
    params = audit_parameters(config, catalogue, run_id)
    if threshold is not None:
        params["k"] = threshold
    sha256 = layer_sha256(config)
    con.execute("begin transaction")
    try:
        if "rule_catalogue" not in _existing_tables(con):
            store_catalogue(con, catalogue)
        store_unit_types(con, config)
        updated = incremental and _layer_current(con, sha256)
        # A second audience of the same run finds the layer holding this run already: its
        # facts are those the first build folded in, so there is nothing to recompute.
        if build_layer and not (updated and _layer_current(con, sha256, with_scope=True)):
            run_sql(con, _LAYER_SCOPE if updated else _LAYER_RESET)
            run_sql(con, _LAYER_UPDATE, period=config.audit.period, layer_sha256=sha256)
        for path in _WORK_FILES:
            run_sql(con, path, **params)
        suppress_complementary(con)
        suppress_determined(con)
        for path in _PUBLISH_FILES:
            run_sql(con, path, **params)
        for table in _TEMP_TABLES:
            con.execute(f"drop table if exists {table}")
        con.execute("commit")
    except BaseException:
        con.execute("rollback")
        raise
    return updated
