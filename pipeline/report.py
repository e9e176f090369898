"""Outputs of the audit: tables as Parquet and CSV, an Excel workbook and one HTML report.

Everything in the output folder except ``restricted/`` is aggregate and small-cell
suppressed (the audit tables of ``pipeline.audit.PUBLISHED_TABLES``). ``restricted/`` holds
the laboratory's review worklist: row level, pseudonymised, with accession numbers; it is
created readable by its owner only. Each file is written under a temporary name in its
folder and moved into place with ``os.replace``, so a reader never sees half a file.

The HTML report opens offline: styles are inline, charts are inline SVG rendered by
vl-convert from altair specifications (no scripts, no fonts, no images fetched).
"""

from __future__ import annotations

import json
import os
import re
import stat
import tempfile
from collections.abc import Callable, Iterable
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any

import altair as alt
import duckdb
import jinja2
import polars as pl
import vl_convert
import xlsxwriter
from markupsafe import Markup, escape

from pipeline import __version__
from pipeline.audit import PUBLISHED_TABLES, RESTRICTED_TABLES, build_audit
from pipeline.config import SiteConfig
from pipeline.errors import StorageError
from pipeline.log import Log
from pipeline.rules import load_catalogue
from pipeline.testhooks import pause_point

CAUTION = (
    "This report is an audit aid, not a diagnostic device; thresholds follow local policy and licensed "
    "clinical judgement. Data-quality flags are possibilities to investigate, not verdicts: do not withdraw a "
    "result on a flag alone, and act on no result for an individual patient without clinical review."
)
# What the audit cannot know: shown with the caution at the top and the foot of the report, in the
# workbooks' about sheet, and in the README's caution block.
LIMITS = (
    (
        "Targets are inferred",
        "No oxygen prescription is exported, so the target range is inferred: 88-92 % when a hypercapnic-risk "
        "flag is documented or PaCO2 is above normal, else the range the site sets for the unit type, else "
        "94-98 %. A patient's prescribed target may differ.",
    ),
    (
        "Rates are per sample",
        "Every blood gas counts once, so a patient sampled often (usually the sickest) weighs more than one "
        "sampled once.",
    ),
    (
        "No case-mix adjustment",
        "Units are compared as they are: a unit whose patients are sicker can differ from the others for that "
        "reason alone.",
    ),
    (
        "Not a real-time check",
        "This nightly job sees results after they were reported and acted on; it is no substitute for the "
        "laboratory's real-time delta checks.",
    ),
    (
        "Adults only",
        "Oxygenation rates count adults and samples without an age; neonates and children are counted apart, "
        "outside the adult targets, the adult A-a formula and the saturation curve check.",
    ),
)
SUPPRESSED = "suppressed"
REPORT_NAME = "audit_report.html"
WORKBOOK_NAME = "audit_tables.xlsx"
TABLES_DIR = "tables"
RESTRICTED_DIR = "restricted"
TEMPLATES = Path(__file__).resolve().parent / "templates"
EXCEL_MAX_ROWS = 1_000_000  # a sheet holds 1 048 576 rows; Parquet and CSV always hold every row
# Text a spreadsheet would run as a formula (OWASP "CSV injection") gets a leading apostrophe.
_FORMULA_START = r"^[=+\-@\t\r]"
_PROPORTION_COLUMNS = {
    "rate",
    "ci_low",
    "ci_high",
    "share",
    "centre",
    "lower_limit",
    "upper_limit",
    "laney_lower_limit",
    "laney_upper_limit",
    "overall_rate",
    "lower_95",
    "upper_95",
    "lower_998",
    "upper_998",
}
# Chart colours (our own plain palette).
RATE_COLOUR = "#2b5c8a"
SIGNAL_COLOUR = "#c2410c"
LIMIT_COLOUR = "#7a7a7a"
CENTRE_COLOUR = "#3d3d3d"
BAND_COLOUR = "#e4e8ec"


# --------------------------------------------------------------------------------------
# Files
# --------------------------------------------------------------------------------------


def atomic_write(path: Path, write: Callable[[Path], None], mode: int = 0o640) -> Path:
    """Write ``path`` via ``write(temporary_path)`` in the same folder, then ``os.replace`` it into place."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        write(tmp)
        with open(tmp, "rb") as handle:
            os.fsync(handle.fileno())
        os.chmod(tmp, mode)
        pause_point("report")  # test-only: crash tests kill the run here, between write and rename
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def _suppressed_sets(frame: pl.DataFrame) -> list[set[str]]:
    if "suppressed_columns" not in frame.columns:
        return [set()] * frame.height
    return [set(s.split(", ")) if s else set() for s in frame["suppressed_columns"].to_list()]


def csv_frame(frame: pl.DataFrame) -> pl.DataFrame:
    """The frame as it goes into a CSV file: suppressed cells say ``suppressed`` (distinct from 0 and
    from an empty cell, which means "not defined"), and text cells cannot start a formula."""
    columns: list[pl.Series] = []
    flags = _suppressed_sets(frame)
    for name in frame.columns:
        series = frame[name]
        hidden = [name in f for f in flags]
        if series.dtype == pl.String:
            series = (
                pl.select(pl.when(series.str.contains(_FORMULA_START)).then(pl.lit("'") + series).otherwise(series))
                .to_series()
                .alias(name)
            )
        if any(hidden):
            text = series.cast(pl.String)
            series = pl.Series(name, [SUPPRESSED if h else v for h, v in zip(hidden, text.to_list(), strict=True)])
        columns.append(series)
    return pl.DataFrame(columns)


def _write_parquet(frame: pl.DataFrame, path: Path, mode: int) -> Path:
    return atomic_write(path, lambda tmp: frame.write_parquet(tmp), mode)


def _write_csv(frame: pl.DataFrame, path: Path, mode: int) -> Path:
    prepared = csv_frame(frame)
    return atomic_write(path, lambda tmp: prepared.write_csv(tmp), mode)


def _write_workbook(path: Path, about: list[tuple[str, str]], sheets: dict[str, pl.DataFrame], mode: int) -> Path:
    def write(tmp: Path) -> None:
        book = xlsxwriter.Workbook(
            str(tmp),
            {"strings_to_formulas": False, "strings_to_urls": False, "strings_to_numbers": False},
        )
        bold = book.add_format({"bold": True})
        wrap = book.add_format({"text_wrap": True, "valign": "top"})
        header = book.add_format({"bold": True, "bg_color": "#e4e8ec", "border": 1})
        percent = book.add_format({"num_format": "0.0%"})
        day = book.add_format({"num_format": "yyyy-mm-dd"})
        moment = book.add_format({"num_format": "yyyy-mm-dd hh:mm"})
        marker = book.add_format({"italic": True, "font_color": "#7a7a7a"})
        sheet = book.add_worksheet("about")
        sheet.set_column(0, 0, 28)
        sheet.set_column(1, 1, 110)
        for row, (key, value) in enumerate(about):
            sheet.write_string(row, 0, key, bold)
            sheet.write_string(row, 1, value, wrap)
        for name, frame in sheets.items():
            sheet = book.add_worksheet(name[:31])
            flags = _suppressed_sets(frame)
            for col, column in enumerate(frame.columns):
                sheet.write_string(0, col, column, header)
                width = max([len(column)] + [len(str(v)) for v in frame[column].head(200).to_list()])
                sheet.set_column(col, col, min(max(width + 2, 8), 60))
            for row_number, row in enumerate(frame.head(EXCEL_MAX_ROWS).iter_rows(), start=1):
                for col, (column, value) in enumerate(zip(frame.columns, row, strict=True)):
                    if column in flags[row_number - 1]:
                        sheet.write_string(row_number, col, SUPPRESSED, marker)
                    elif value is None:
                        continue
                    elif isinstance(value, bool):
                        sheet.write_boolean(row_number, col, value)
                    elif isinstance(value, (int, float)):
                        fmt = percent if column in _PROPORTION_COLUMNS else None
                        sheet.write_number(row_number, col, value, fmt)
                    elif isinstance(value, datetime):
                        sheet.write_datetime(row_number, col, value, moment)
                    elif isinstance(value, date):
                        sheet.write_datetime(row_number, col, datetime(value.year, value.month, value.day), day)
                    else:
                        sheet.write_string(row_number, col, str(value))
            sheet.freeze_panes(1, 0)
            if frame.height:
                sheet.autofilter(0, 0, min(frame.height, EXCEL_MAX_ROWS), max(frame.width - 1, 0))
        book.close()

    return atomic_write(path, write, mode)


# --------------------------------------------------------------------------------------
# Charts
# --------------------------------------------------------------------------------------


def svg_markup(chart: alt.TopLevelMixin, prefix: str) -> Markup:
    """Render a chart to inline SVG offline; element ids get ``prefix`` so several SVGs share a page."""
    svg = vl_convert.vegalite_to_svg(chart.to_dict(validate=False), allowed_base_urls=[])
    ids = set(re.findall(r'\bid="([^"]+)"', svg))
    for ident in sorted(ids, key=len, reverse=True):
        new = f"{prefix}-{ident}"
        svg = svg.replace(f'id="{ident}"', f'id="{new}"').replace(f"url(#{ident})", f"url(#{new})")
        svg = svg.replace(f'href="#{ident}"', f'href="#{new}"')
    svg = re.sub(r"<svg ", '<svg role="img" ', svg, count=1)
    return Markup(svg)  # vl-convert output: text in it is escaped by the renderer


def trend_chart(points: pl.DataFrame, limit_kind: str) -> alt.TopLevelMixin:
    """Small multiples, one per unit: the rate per period with its centre line and control limits."""
    data = points.select(
        "unit",
        pl.col("period_start").cast(pl.Date).cast(pl.String).alias("period_start"),
        "period",
        "rate",
        "centre",
        pl.col("laney_lower_limit" if limit_kind == "laney" else "lower_limit").alias("lower"),
        pl.col("laney_upper_limit" if limit_kind == "laney" else "upper_limit").alias("upper"),
        pl.col("signals").fill_null(""),
    ).with_columns(pl.when(pl.col("signals") == "").then(pl.lit("no")).otherwise(pl.lit("yes")).alias("signal"))
    x = alt.X("period_start:T", title=None, axis=alt.Axis(format="%d %b", labelAngle=-40, labelFontSize=9))
    y_scale = alt.Scale(zero=False)
    axis = alt.Axis(format=".1~%", title=None)
    base = alt.Chart().encode(x=x)
    band = base.mark_area(color=BAND_COLOUR, interpolate="step").encode(
        y=alt.Y("lower:Q", scale=y_scale, axis=axis), y2=alt.Y2("upper:Q")
    )
    limits = [
        base.mark_line(color=LIMIT_COLOUR, strokeDash=[4, 3], interpolate="step", strokeWidth=1).encode(
            y=alt.Y(f"{column}:Q", scale=y_scale, axis=axis)
        )
        for column in ("upper", "lower")
    ]
    centre = base.mark_line(color=CENTRE_COLOUR, strokeWidth=1).encode(y=alt.Y("centre:Q", scale=y_scale, axis=axis))
    line = base.mark_line(color=RATE_COLOUR, strokeWidth=1.6).encode(y=alt.Y("rate:Q", scale=y_scale, axis=axis))
    dots = base.mark_point(filled=True, size=36, opacity=1).encode(
        y=alt.Y("rate:Q", scale=y_scale, axis=axis),
        color=alt.Color(
            "signal:N",
            scale=alt.Scale(domain=["no", "yes"], range=[RATE_COLOUR, SIGNAL_COLOUR]),
            legend=alt.Legend(title="special-cause signal", orient="top"),
        ),
        tooltip=[
            alt.Tooltip("unit:N"),
            alt.Tooltip("period:N"),
            alt.Tooltip("rate:Q", format=".1%"),
            alt.Tooltip("signals:N"),
        ],
    )
    return (
        alt.layer(band, *limits, centre, line, dots, data=data)
        .properties(width=230, height=120)
        .facet(facet=alt.Facet("unit:N", title=None, header=alt.Header(labelFontWeight="bold")), columns=3)
        .resolve_scale(y="independent")
    )


def funnel_chart(points: pl.DataFrame, curve: pl.DataFrame, title: str) -> alt.TopLevelMixin:
    """Each unit's rate against its volume, inside 95 % and 99.8 % limits around the overall rate."""
    lines_data = curve.select("volume", "overall_rate", "lower_95", "upper_95", "lower_998", "upper_998")
    shown = points.filter(pl.col("rate").is_not_null()).select("unit", "denominator", "rate", "position")
    x = alt.X("volume:Q", title="denominator (samples)", scale=alt.Scale(zero=False))
    axis = alt.Axis(format=".1~%", title="rate")
    lines = [
        alt.Chart(lines_data)
        .mark_line(color=LIMIT_COLOUR, strokeDash=dash, strokeWidth=1)
        .encode(x=x, y=alt.Y(f"{column}:Q", axis=axis, scale=alt.Scale(zero=False)))
        for column, dash in (("lower_95", [4, 3]), ("upper_95", [4, 3]), ("lower_998", [1, 0]), ("upper_998", [1, 0]))
    ]
    centre = (
        alt.Chart(lines_data)
        .mark_line(color=CENTRE_COLOUR, strokeWidth=1)
        .encode(x=x, y=alt.Y("overall_rate:Q", axis=axis))
    )
    dots = (
        alt.Chart(shown)
        .mark_point(filled=True, size=60, opacity=1)
        .encode(
            x=alt.X("denominator:Q", scale=alt.Scale(zero=False)),
            y=alt.Y("rate:Q", axis=axis, scale=alt.Scale(zero=False)),
            color=alt.condition("datum.position == 'within limits'", alt.value(RATE_COLOUR), alt.value(SIGNAL_COLOUR)),
            tooltip=[
                alt.Tooltip("unit:N"),
                alt.Tooltip("denominator:Q"),
                alt.Tooltip("rate:Q", format=".1%"),
                alt.Tooltip("position:N"),
            ],
        )
    )
    labels = (
        alt.Chart(shown)
        .mark_text(align="left", dx=6, dy=-6, fontSize=9, color=CENTRE_COLOUR)
        .encode(x=alt.X("denominator:Q"), y=alt.Y("rate:Q"), text=alt.Text("unit:N"))
    )
    return alt.layer(*lines, centre, dots, labels).properties(width=330, height=220, title=title)


# --------------------------------------------------------------------------------------
# The HTML report
# --------------------------------------------------------------------------------------


def _number(value: Any, kind: str) -> str:
    if kind == "pct":
        return f"{value * 100:.1f} %"
    if kind == "count":
        return f"{int(value):,}".replace(",", "\u2009")
    if kind == "real":
        return f"{value:.2f}"
    return str(value)


def cell(row: dict[str, Any], column: str, kind: str = "text") -> Markup:
    """One table cell's content: the value, or the suppressed marker, or a dash when not defined."""
    hidden = set((row.get("suppressed_columns") or "").split(", "))
    if column in hidden:
        return Markup('<span class="supp" title="suppressed: small count or derivable from one">*</span>')
    value = row.get(column)
    if value is None:
        return Markup('<span class="na">&ndash;</span>')
    return escape(_number(value, kind))


def rate_with_counts(row: dict[str, Any], numerator: str = "numerator", denominator: str = "denominator") -> Markup:
    """'12.3 % (45/366)' with the interval as a tooltip, or the suppressed marker."""
    hidden = set((row.get("suppressed_columns") or "").split(", "))
    if numerator in hidden or denominator in hidden:
        shown_n = "" if denominator in hidden else f" (n {_number(row[denominator], 'count')})"
        return Markup(f'<span class="supp" title="suppressed">*</span>{escape(shown_n)}')
    rate = row.get("rate", row.get("share"))
    if rate is None:
        return Markup('<span class="na">&ndash;</span>')
    tip = f"95 % CI {_number(row['ci_low'], 'pct')} to {_number(row['ci_high'], 'pct')}"
    text = f"{_number(rate, 'pct')} ({_number(row[numerator], 'count')}/{_number(row[denominator], 'count')})"
    return Markup(f'<span title="{escape(tip)}">{escape(text)}</span>')


def _rows(frame: pl.DataFrame) -> list[dict[str, Any]]:
    return frame.to_dicts()


def _table(con: duckdb.DuckDBPyConnection, name: str) -> pl.DataFrame:
    return con.sql(f"select * from {name}").pl()


def _has_table(con: duckdb.DuckDBPyConnection, name: str) -> bool:
    rows = con.execute(
        "select count(*) from information_schema.tables where table_schema = 'main' and table_name = ?", [name]
    ).fetchall()
    return bool(rows[0][0])


def _pivot_rates(rates: pl.DataFrame, periods: list[str]) -> list[dict[str, Any]]:
    """Per measure: rows = units, columns = periods (each cell a row dict for rate_with_counts)."""
    blocks = []
    for (measure,), group in rates.group_by("measure", maintain_order=True):
        units = group.filter(~pl.col("all_periods")).select("unit", "all_units").unique(maintain_order=True)
        table = []
        for unit, _ in units.iter_rows():
            cells = {r["period"]: r for r in group.filter(pl.col("unit") == unit).to_dicts()}
            table.append({"unit": unit, "cells": [cells.get(p) for p in periods], "total": cells.get("all periods")})
        definition = group["definition"][0] if "definition" in group.columns else None
        blocks.append({"measure": measure, "title": group["title"][0], "definition": definition, "rows": table})
    return blocks


CONTRACT_COLUMNS = (
    "source_file",
    "check_id",
    "expectation_type",
    "column_name",
    "severity",
    "success",
    "blocking",
    "element_count",
    "unexpected_count",
    "unexpected_percent",
    "observed",
)


def _contract(con: duckdb.DuckDBPyConnection, run_id: str) -> dict[str, Any] | None:
    """The incoming-batch contract results of this run (file names only), or None when no check has run."""
    if not _has_table(con, "contract_results"):
        return None
    results = _table(con, "contract_results")
    if results.is_empty():
        return None
    earlier = results.height
    if "run_id" in results.columns:
        results = results.filter(pl.col("run_id") == run_id)
        earlier -= results.height
    columns = [c for c in CONTRACT_COLUMNS if c in results.columns] or [c for c in results.columns if c != "run_id"]
    results = results.select(columns).with_columns(
        pl.col(c).str.replace(r"^.*[/\\]", "")
        for c in columns
        if ("file" in c or "path" in c) and results[c].dtype == pl.String
    )
    if "success" in results.columns:
        results = results.sort("success", nulls_last=True)
    return {"columns": columns, "rows": results.head(500).rows(), "total": results.height, "earlier": earlier}


def _reconciliation(frame: pl.DataFrame) -> dict[str, Any]:
    loaded = frame.filter(pl.col("outcome") == "loaded")
    totals = {c: int(loaded[c].sum() or 0) for c in ("rows_in", "rows_loaded", "rows_quarantined", "rows_duplicate")}
    totals["rows_superseded_in_file"] = int(loaded["rows_superseded_in_file"].sum() or 0)
    parts = totals["rows_loaded"] + totals["rows_quarantined"] + totals["rows_duplicate"]
    totals["balanced"] = totals["rows_in"] == parts + totals["rows_superseded_in_file"]
    return {"files": _rows(frame), "totals": totals}


def _unit_targets(config: SiteConfig) -> str:
    """The site's target ranges per unit type, in words (unit types are the site's own labels)."""
    seen: dict[str, str] = {}
    for _, unit_type, low, high, assessed in config.unit_target_rows():
        if not assessed:
            seen[unit_type] = "no target (not assessed)"
        elif low is not None and high is not None:
            seen[unit_type] = f"{low:g}-{high:g} %"
    if not seen:
        return "This site sets no target by unit type."
    return "This site's unit types: " + "; ".join(f"{t} {v}" for t, v in sorted(seen.items())) + "."


def _definitions(config: SiteConfig, derive: dict[str, Any]) -> list[tuple[str, str]]:
    s = config.audit
    hypoxaemia_limits = (
        f"PaO2 < {derive['hypoxaemia_pao2_mmhg']:g} mmHg (8 kPa, respiratory failure) or arterial saturation < "
        f"{derive['hypoxaemia_sat_pct']:g} %"
    )
    return [
        (
            "Oxygen target range",
            "No prescription is exported, so the target is inferred, in this order: "
            f"{derive['hypercapnic_target_low']:g}-{derive['hypercapnic_target_high']:g} % when a hypercapnic-risk "
            f"flag is documented or PaCO2 > {derive['hypercapnic_paco2_mmhg']:g} mmHg; else the range the site "
            f"sets for the unit type (or none); else {derive['target_low']:g}-{derive['target_high']:g} % (BTS "
            "emergency oxygen guideline 2017, O'Driscoll BR et al., Thorax 72 Suppl 1). Children and neonates have "
            f"no adult target. {_unit_targets(config)}",
        ),
        (
            "Age groups",
            f"Age as exported, else from the birth date at collection. Neonate: under {derive['neonate_days']:g} "
            f"days; child: from then up to {derive['adult_age_years']:g} years (a site setting); adult: older. "
            "Samples with neither age nor birth date are 'age unknown': adult targets are applied and they are "
            "counted in the adult rates. Neonates and children are counted by unit and period in the age-group "
            "table and are outside every oxygenation rate and the P/F bands: the adult targets, the adult A-a "
            "formula and the saturation curve check (neonatal blood with fetal haemoglobin sits on another curve) "
            "do not apply to them.",
        ),
        (
            "Hypoxaemia",
            "Arterial saturation below the lower end of the target range that applies and "
            f"{hypoxaemia_limits} (common practice): a patient at risk of hypercapnic failure inside 88-92 % is in "
            "target, not hypoxaemic. Among included adult arterial samples with a PaO2 and a target range that "
            "applies.",
        ),
        (
            "Hyperoxaemia on supplemental oxygen",
            f"PaO2 > {derive['hyperoxaemia_pao2_mmhg']:g} mmHg (13.3 kPa, supraphysiological) while FiO2 > "
            f"{derive['room_air_fio2_max']:g} or an oxygen device is documented (UK ICU cohort, Am J Respir Crit Care "
            "Med 2019; from memory). Among included adult arterial samples with a target range that applies and "
            "supplemental oxygen documented.",
        ),
        (
            "Above target on supplemental oxygen",
            "Arterial saturation (co-oximetry, else predicted from PaO2 by the Severinghaus 1979 equation) above the "
            "upper end of the target range that applies, while on supplemental oxygen; includes hyperoxaemic samples. "
            "Samples whose oxygen status is unknown, or that have no target, are never counted in or above target.",
        ),
        (
            "Oxygen given but not documented",
            "PaO2 above what the alveolar PO2 of room air allows (alveolar gas equation with R 1, at the patient's "
            "temperature, plus a tolerance) while no supplemental oxygen is documented: the patient was breathing "
            "oxygen that nobody charted. Numerator: those samples. Denominator: included adult arterial samples with "
            "a PaO2 and a target range that applies and no supplemental oxygen documented (neither FiO2 nor device, "
            "or room air documented).",
        ),
        (
            "Oxygen status unknown",
            "Neither FiO2 nor an oxygen device documented and PaO2 within what room air allows, so whether the "
            "patient was on oxygen cannot be told. Among included adult arterial samples with a PaO2 and a target "
            "range that applies (the hypoxaemia denominator). These samples count towards hypoxaemia (a low "
            "saturation is low on any FiO2) but never as in or above target.",
        ),
        (
            "A-a gradient above the age-expected limit",
            "Adult room-air samples only (the age formula is an adult room-air formula); samples whose PaO2 shows "
            "undocumented oxygen are left out. Alveolar PO2 from the alveolar gas equation with R "
            f"{derive['rq']:g}; limit method {derive['aa_method']} (see the formula notes).",
        ),
        (
            "Denominators",
            "FiO2 and device documentation: every sample labelled arterial or of unknown type. Oxygenation measures, "
            "oxygen status unknown and oxygen given but not documented: only adult samples (or age unknown) whose "
            "audit status is usable or caution (a data-quality flag that makes the record unreliable excludes it; "
            "exclusions are counted separately in the volume table, neonates and children in the age-group table). "
            "Every rate is per sample, not per patient, and unadjusted for case mix.",
        ),
        (
            "Confidence intervals",
            "Wilson score interval, 95 % (Wilson EB 1927, J Am Stat Assoc 22:209; recommended by Brown, Cai & "
            "DasGupta 2001, Stat Sci 16:101).",
        ),
        (
            "Control charts",
            f"p-chart with varying subgroup size: centre = all events / all samples of the unit over the window, "
            f"limits centre +/- {s.sigma:g} standard errors for each period's denominator (Shewhart). Laney p' limits "
            "(Laney 2002, Quality Engineering 14:531) widen them by sigma-z, the spread of the standardised rates "
            f"between periods; signals use the {'Laney' if s.chart_limits == 'laney' else 'p-chart'} limits.",
        ),
        (
            "Special-cause signals",
            f"beyond limits: a point outside the limits; shift: {s.shift_run} or more points in a row on one side of "
            f"the centre line (Western Electric Statistical Quality Control Handbook 1956; Nelson LS 1984, J Qual "
            f"Technol 16:237 uses 9, NHS Making Data Count 7); trend: {s.trend_run} or more points in a row each "
            "rising or each falling (Nelson 1984; guides use 5-7). Citations from memory; each is a site setting.",
        ),
        (
            "Funnel plot",
            "Each unit's rate over the whole window against its denominator, with 95 % and 99.8 % limits around "
            "the overall rate (normal approximation; Spiegelhalter DJ 2005, Stat Med 24:1185, from memory).",
        ),
        (
            "Small-cell suppression",
            f"No count from 1 to {config.small_cell_threshold - 1} is shown (US CMS cell size suppression "
            "policy: no cell 1-10 shown or derivable; threshold configurable), nor a numerator whose "
            "denominator minus numerator is that small, nor any rate, interval or limit derived from a hidden "
            "count. Complementary suppression then hides one more count in every unit row, period column and "
            "sum (status, exclusion, sample-type, age-group and oxygen-documentation splits, P/F bands) that would "
            "otherwise let a hidden count be recovered from its total, and more counts wherever several sums taken "
            "together would still give a hidden count away (checked by linear algebra over every published sum). "
            "Hidden cells show * here and 'suppressed' in CSV and Excel; 0 is a real zero.",
        ),
        (
            "Reporting window",
            f"The latest {s.history_periods} {s.period}s with data"
            + (", leaving out the period still under way." if s.complete_periods_only else ".")
            + " Times are collection times in UTC.",
        ),
    ]


def render_report(con: duckdb.DuckDBPyConnection, config: SiteConfig, run_id: str) -> str:
    """The self-contained HTML report for the store's current audit tables."""
    catalogue = load_catalogue(config.thresholds)
    volume = _table(con, "audit_volume")
    rates = _table(con, "audit_rates")
    chart = _table(con, "audit_control_chart")
    funnel = _table(con, "audit_funnel")
    curve = _table(con, "audit_funnel_curve")
    flag_rates = _table(con, "audit_flag_rates")
    bands = _table(con, "audit_pf_bands")
    ages = _table(con, "audit_age_groups")
    qc = _table(con, "audit_analyser_qc")
    reconciliation = _table(con, "audit_run_reconciliation")
    rules = _table(con, "rule_catalogue")
    worklist_rows = con.execute(
        "select count(*), is_small_cell(count(*), ?) from review_worklist", [config.small_cell_threshold]
    ).fetchall()[0]
    run = con.execute(
        "select command, started_at, finished_at, outcome, summary from runs where run_id = ?", [run_id]
    ).fetchall()
    contract = _contract(con, run_id)

    periods = volume.filter(~pl.col("all_periods")).sort("period_start")["period"].unique(maintain_order=True).to_list()
    recent = periods[-12:]
    measures = rates.select("sort_order", "measure", "title", "basis").unique().sort("sort_order").to_dicts()
    total = volume.filter(pl.col("all_units") & pl.col("all_periods")).to_dicts()
    age_total = ages.filter(pl.col("all_units") & pl.col("all_periods")).to_dicts()
    hospital = rates.filter(pl.col("all_units")).sort("sort_order")
    latest = periods[-1] if periods else None

    charts = []
    for index, m in enumerate(measures):
        points = chart.filter(pl.col("measure") == m["measure"]).sort("all_units", "unit", "period_start")
        signals = points.filter(pl.col("signals").is_not_null()).select("unit", "period", "signals").to_dicts()
        svg = svg_markup(trend_chart(points, config.audit.chart_limits), f"t{index}") if points.height else None
        sigma_z = points.group_by("unit", maintain_order=True).agg(pl.col("laney_sigma_z").max()).to_dicts()
        charts.append({**m, "svg": svg, "signals": signals, "sigma_z": sigma_z})
    funnels = []
    for index, m in enumerate(measures):
        points = funnel.filter(pl.col("measure") == m["measure"])
        lines = curve.filter(pl.col("measure") == m["measure"])
        svg = svg_markup(funnel_chart(points, lines, m["title"]), f"f{index}") if lines.height else None
        funnels.append({**m, "svg": svg, "rows": _rows(points)})

    signal_count = chart.filter(pl.col("signals").is_not_null()).height
    latest_signals = (
        chart.filter((pl.col("period") == latest) & pl.col("signals").is_not_null()).to_dicts() if latest else []
    )
    outliers = funnel.filter(pl.col("position").is_in(["above 99.8 % limit", "below 99.8 % limit"])).to_dicts()
    dq_rules = rules.filter(pl.col("kind").is_in(["data_quality", "documentation"]))
    flags_total = flag_rates.filter(pl.col("all_periods"))
    units = volume.filter(~pl.col("all_units"))["unit"].unique(maintain_order=True).to_list()
    flag_matrix = []
    severity_order = {"high": 0, "medium": 1, "low": 2, "info": 3}
    ordered = sorted(dq_rules.to_dicts(), key=lambda r: (severity_order.get(r["severity"], 9), r["rule_id"]))
    for rule in ordered:
        rows = {r["unit"]: r for r in flags_total.filter(pl.col("rule_id") == rule["rule_id"]).to_dicts()}
        flag_matrix.append({"rule": rule, "cells": [rows.get(u) for u in units], "total": rows.get("All units")})
    band_rows = bands.filter(pl.col("all_periods")).sort("all_units", "unit", "sort_order")
    band_matrix = []
    for unit in [*units, "All units"]:
        rows = band_rows.filter(pl.col("unit") == unit).to_dicts()
        if rows:
            band_matrix.append({"unit": unit, "cells": rows})

    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATES),
        autoescape=jinja2.select_autoescape(["html", "j2"], default_for_string=True),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.globals.update(cell=cell, rate_with_counts=rate_with_counts, number=_number)
    template = env.get_template("audit_report.html.j2")
    return template.render(
        caution=CAUTION,
        limits=LIMITS,
        site_name=config.site_name,
        run_id=run_id,
        run=run[0] if run else None,
        generated_at=datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
        version=__version__,
        settings=config.audit,
        k=config.small_cell_threshold,
        periods=periods,
        recent=recent,
        window=(periods[0], periods[-1]) if periods else None,
        total=total[0] if total else None,
        hospital=_rows(hospital),
        hospital_window=_rows(hospital.filter(pl.col("all_periods"))),
        hospital_latest=_rows(hospital.filter(pl.col("period") == latest)) if latest else [],
        latest=latest,
        signal_count=signal_count,
        latest_signals=latest_signals,
        outliers=outliers,
        charts=charts,
        funnels=funnels,
        rate_blocks=_pivot_rates(rates, recent),
        volume=_rows(volume.filter(pl.col("all_periods") | pl.col("period").is_in(recent))),
        units=units,
        flag_matrix=flag_matrix,
        band_matrix=band_matrix,
        ages=_rows(ages.filter(pl.col("all_periods") | pl.col("period").is_in(recent))),
        age_total=age_total[0] if age_total else None,
        worklist_count=None if worklist_rows[1] else worklist_rows[0],
        worklist_path=f"{RESTRICTED_DIR}/review_worklist.csv",
        qc=_rows(qc),
        rules=_rows(rules.sort("kind", "rule_id")),
        contract=contract,
        reconciliation=_reconciliation(reconciliation),
        definitions=_definitions(config, catalogue.derive),
        parameters=lambda text: ", ".join(f"{k} {v}" for k, v in json.loads(text or "{}").items()),
    )


# --------------------------------------------------------------------------------------
# Entry points
# --------------------------------------------------------------------------------------


def _header(config: SiteConfig, run_id: str) -> list[tuple[str, str]]:
    """The first rows of every workbook's about sheet: the caution, what the audit cannot know, the run."""
    return [
        ("Caution", CAUTION),
        *((f"Cannot know: {title.lower()}", text) for title, text in LIMITS),
        ("Site", config.site_name),
        ("Run", run_id),
        ("Generated", datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")),
    ]


def _about(config: SiteConfig, run_id: str) -> list[tuple[str, str]]:
    return [
        *_header(config, run_id),
        ("Period", f"{config.audit.period}; latest {config.audit.history_periods} periods with data"),
        (
            "Suppressed cells",
            f"'{SUPPRESSED}': a count from 1 to {config.small_cell_threshold - 1}, or a value from which one could be "
            "derived (US CMS cell size suppression policy). 0 is a real zero; an empty cell means not defined.",
        ),
        ("Row-level data", "None. The laboratory's review worklist is kept apart, in the restricted folder."),
    ]


def write_outputs(con: duckdb.DuckDBPyConnection, config: SiteConfig, run_id: str, log: Log) -> list[Path]:
    """Write every published table (Parquet, CSV), the workbook, the HTML report and the restricted worklist."""
    out = config.output_folder
    try:
        out.mkdir(parents=True, exist_ok=True, mode=0o750)
        (out / TABLES_DIR).mkdir(exist_ok=True, mode=0o750)
        for published in (out, out / TABLES_DIR):
            # A run's umask is 077 (the store's files); the analysts' group still needs to enter these.
            os.chmod(published, stat.S_IMODE(published.stat().st_mode) | 0o050)
        restricted = out / RESTRICTED_DIR
        restricted.mkdir(exist_ok=True, mode=0o700)
        os.chmod(restricted, 0o700)
        written: list[Path] = []
        frames = {name: _table(con, name) for name in PUBLISHED_TABLES}
        for name, frame in frames.items():
            written.append(_write_parquet(frame, out / TABLES_DIR / f"{name}.parquet", 0o640))
            written.append(_write_csv(frame, out / TABLES_DIR / f"{name}.csv", 0o640))
        written.append(_write_workbook(out / WORKBOOK_NAME, _about(config, run_id), frames, 0o640))
        for name in RESTRICTED_TABLES:
            frame = _table(con, name)
            written.append(_write_parquet(frame, restricted / f"{name}.parquet", 0o600))
            written.append(_write_csv(frame, restricted / f"{name}.csv", 0o600))
            about = [*_header(config, run_id), ("Restricted", "Row level, pseudonymised; laboratory use only.")]
            written.append(_write_workbook(restricted / f"{name}.xlsx", about, {name: frame}, 0o600))
        html = render_report(con, config, run_id)
        written.append(atomic_write(out / REPORT_NAME, lambda tmp: tmp.write_text(html, encoding="utf-8"), 0o640))
    except OSError as err:
        raise StorageError(f"cannot write the outputs in {out}: {err.strerror or err}") from None
    log.info(f"audit outputs written to {out} ({len(written)} files; report {REPORT_NAME})", outputs=len(written))
    return written


def latest_run_id(con: duckdb.DuckDBPyConnection) -> str:
    rows = con.execute("select run_id from runs order by started_at desc, run_id desc limit 1").fetchall()
    if not rows:
        raise StorageError("the store records no run yet; run the pipeline first")
    return str(rows[0][0])


def rebuild_outputs(config: SiteConfig, log: Log) -> list[Path]:
    """Rebuild the audit tables and every output from the store, loading nothing (``abg-audit report``)."""
    from pipeline.run import run_lock
    from pipeline.store import open_store

    if not config.store_path.exists():
        raise StorageError(f"no store at {config.store_path}; run the pipeline first")
    catalogue = load_catalogue(config.thresholds)
    with run_lock(config.store_path):
        con = open_store(config.store_path)
        try:
            run_id = latest_run_id(con)
            build_audit(con, config, catalogue, run_id)
            return write_outputs(con, config, run_id, log)
        finally:
            con.close()


def published_files(folder: Path) -> Iterable[Path]:
    """Every output file outside the restricted folder."""
    return (p for p in folder.rglob("*") if p.is_file() and RESTRICTED_DIR not in p.relative_to(folder).parts)
