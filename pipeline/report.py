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
import textwrap
from collections.abc import Callable, Iterable
from datetime import UTC, date, datetime, timedelta
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
from pipeline.audience import Audience, publication
from pipeline.audit import PUBLISHED_TABLES, RESTRICTED_TABLES
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
        "Only patients who had a blood gas",
        "Every figure is about patients sampled for a blood gas, not about all patients on oxygen: a ward that "
        "rarely samples shows only its sickest patients.",
    ),
    (
        "Targets come from the prescription when there is one",
        "A sample is compared with the prescription active when it was taken (from a prescriptions feed, or the "
        "range charted on the sample); otherwise the target is inferred: 88-92 % when a hypercapnic-risk flag is "
        "documented or PaCO2 is above normal, else the range the site sets for the unit type, else 94-98 %.",
    ),
    (
        "Sample and episode rates",
        "Per-sample rates count every blood gas, so a patient sampled often (usually the sickest) weighs more; "
        "episode rates (an encounter, or a patient-day where none is exported) count each patient's stay once. "
        "Each figure says which it is.",
    ),
    (
        "No case-mix adjustment",
        "Units are compared with units of the same type (critical care with critical care, wards with wards), but "
        "not adjusted for how sick their patients are.",
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
# Who is in the figures at all: in every file's metadata, and first among the limits on the page.
SELECTION = f"{LIMITS[0][0]}. {LIMITS[0][1]}"
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

PANEL_WIDTH = 200
CONTROL_HEIGHT = 90
FUNNEL_HEIGHT = 140
PANELS_PER_ROW = 5
# Funnel positions as the legend names them (audit_funnel.position is finer: above or below)
FUNNEL_BANDS = ("within limits", "beyond 95 % limits", "beyond 99.8 % limits")
FUNNEL_COLOURS = ("#5b7083", "#d9901a", "#b42318")


def svg_markup(chart: alt.TopLevelMixin | dict[str, Any], prefix: str) -> Markup:
    """Render a chart (or its specification) to inline SVG offline; element ids get ``prefix`` so several SVGs
    share a page."""
    spec = chart if isinstance(chart, dict) else chart.to_dict(validate=False)
    svg = vl_convert.vegalite_to_svg(spec, allowed_base_urls=[])
    ids = set(re.findall(r'\bid="([^"]+)"', svg))
    for ident in sorted(ids, key=len, reverse=True):
        new = f"{prefix}-{ident}"
        svg = svg.replace(f'id="{ident}"', f'id="{new}"').replace(f"url(#{ident})", f"url(#{new})")
        svg = svg.replace(f'href="#{ident}"', f'href="#{new}"')
    svg = re.sub(r"<svg ", '<svg role="img" ', svg, count=1)
    return Markup(svg)  # vl-convert output: text in it is escaped by the renderer


def _utc_ms(day: date) -> int:
    return int(datetime(day.year, day.month, day.day, tzinfo=UTC).timestamp() * 1000)


def period_axis(starts: list[date], period: str) -> tuple[alt.Scale, alt.Axis]:
    """The time axis of every control chart: one tick on each period's first day (an ISO-week Monday or
    the first of the month), labelled like the tables ('2026-W14', '2026-04')."""
    scale = alt.Scale(type="utc", domain=[_utc_ms(starts[0]), _utc_ms(starts[-1])], nice=False, padding=10)
    pattern = "%G-W%V" if period == "week" else "%Y-%m"  # ISO year and week, as audit_period labels them
    axis = alt.Axis(
        values=[_utc_ms(s) for s in starts],
        labelExpr=f"utcFormat(datum.value, '{pattern}')",  # UTC: the labels do not move with the host's zone
        labelAngle=-50,
        labelFontSize=8.5,
        labelOverlap="parity",
        title=None,
        grid=False,
    )
    return scale, axis


def _panel_label(title: str, subtitle: str) -> str:
    """A facet header: the measure's title wrapped, then the subtitle; '|' separates the lines."""
    return "|".join([*textwrap.wrap(title, 40), *textwrap.wrap(subtitle, 46)])


def _facet(order: list[str], columns: int = PANELS_PER_ROW) -> alt.Facet:
    return alt.Facet(
        "panel:N",
        sort=order,
        title=None,
        header=alt.Header(
            labelExpr="split(datum.value, '|')",
            labelFontSize=10,
            labelAlign="left",
            labelAnchor="start",
            labelLimit=PANEL_WIDTH + 40,
            labelFontWeight="bold",
        ),
    )


def control_chart(
    panels: list[tuple[str, str, pl.DataFrame]],
    starts: list[date],
    period: str,
    limit_kind: str,
    partial: set[str],
) -> alt.TopLevelMixin:
    """Small multiples of p-charts, one panel per (title, subtitle, points): the rate per period with the
    centre line and control limits. A partial period's point is drawn open and labelled; a panel with
    no point to draw says why inside it."""
    frames, order = [], []
    lower = "laney_lower_limit" if limit_kind == "laney" else "lower_limit"
    upper = "laney_upper_limit" if limit_kind == "laney" else "upper_limit"
    for title, subtitle, points in panels:
        shown = int(points["rate"].is_not_null().sum()) if points.height else 0
        if points.height and shown < points.height:
            subtitle = f"{subtitle} · {points.height - shown} of {points.height} points suppressed"
        label = _panel_label(title, subtitle)
        order.append(label)
        note = None
        if points.is_empty():
            note = "no denominator in any period"
        elif not shown:
            note = "every point suppressed (small counts)"
        if points.is_empty():
            frames.append(pl.DataFrame({"panel": [label], "note": [note]}))
            continue
        frames.append(
            points.select(
                pl.lit(label).alias("panel"),
                pl.col("period_start").cast(pl.Date).cast(pl.String).alias("start"),
                "period",
                "rate",
                "centre",
                pl.col(lower).alias("lower"),
                pl.col(upper).alias("upper"),
                pl.col("signals").fill_null(""),
                (pl.lit(note) if note else pl.lit(None, dtype=pl.String)).alias("note"),
            ).with_columns(
                pl.col("period").is_in(sorted(partial)).alias("partial"),
                pl.when(pl.col("signals") == "").then(pl.lit("no")).otherwise(pl.lit("yes")).alias("signal"),
                (pl.int_range(pl.len()) == 0).alias("first"),
            )
        )
    data = pl.concat(frames, how="diagonal_relaxed")
    scale, axis = period_axis(starts, period)
    x = alt.X("start:T", scale=scale, axis=axis)
    y_scale = alt.Scale(zero=False)
    y_axis = alt.Axis(format=".0~%", title=None, tickCount=4, labelFontSize=8.5)
    base = alt.Chart().encode(x=x)
    band = base.mark_area(color=BAND_COLOUR).encode(y=alt.Y("lower:Q", scale=y_scale, axis=y_axis), y2="upper:Q")
    limits = [
        base.mark_line(color=LIMIT_COLOUR, strokeDash=[4, 3], strokeWidth=1).encode(y=alt.Y(f"{c}:Q", scale=y_scale))
        for c in ("upper", "lower")
    ]
    centre = base.mark_line(color=CENTRE_COLOUR, strokeWidth=1).encode(y=alt.Y("centre:Q", scale=y_scale))
    line = base.mark_line(color=RATE_COLOUR, strokeWidth=1.5).encode(y=alt.Y("rate:Q", scale=y_scale))
    tooltip = [alt.Tooltip("period:N"), alt.Tooltip("rate:Q", format=".1%"), alt.Tooltip("signals:N")]
    colour = alt.Color(
        "signal:N", scale=alt.Scale(domain=["no", "yes"], range=[RATE_COLOUR, SIGNAL_COLOUR]), legend=None
    )
    dots = (
        base.transform_filter("!datum.partial && datum.rate != null")
        .mark_point(filled=True, size=30, opacity=1)
        .encode(y=alt.Y("rate:Q", scale=y_scale), color=colour, tooltip=tooltip)
    )
    open_dots = (
        base.transform_filter("datum.partial && datum.rate != null")
        .mark_point(filled=False, size=42, strokeWidth=1.6, opacity=1)
        .encode(y=alt.Y("rate:Q", scale=y_scale), color=colour, tooltip=tooltip)
    )
    partial_label = (
        base.transform_filter("datum.partial && datum.rate != null")
        .mark_text(dy=-9, fontSize=8.5, color=CENTRE_COLOUR, text="partial")
        .encode(y=alt.Y("rate:Q", scale=y_scale))
    )
    note = (
        alt.Chart()
        .transform_filter("datum.note != null && (datum.first == null || datum.first)")
        .mark_text(fontSize=10.5, color=CENTRE_COLOUR, fontStyle="italic")
        .encode(x=alt.value(PANEL_WIDTH / 2), y=alt.value(CONTROL_HEIGHT / 2), text="note:N")
    )
    return (
        alt.layer(band, *limits, centre, line, dots, open_dots, partial_label, note, data=data)
        .properties(width=PANEL_WIDTH, height=CONTROL_HEIGHT)
        .facet(facet=_facet(order), columns=PANELS_PER_ROW, spacing={"row": 14, "column": 22})
        .resolve_scale(y="independent")
        .resolve_axis(x="independent")  # every panel its own time axis: a shared one sits under empty cells
        .configure_view(stroke=None)
        .configure_axis(domainColor="#9aa5b1", tickColor="#9aa5b1")
    )


def funnel_band(position: str | None) -> str | None:
    if position is None:
        return None
    if "99.8" in position:
        return FUNNEL_BANDS[2]
    if "95" in position:
        return FUNNEL_BANDS[1]
    return FUNNEL_BANDS[0]


def funnel_chart(panels: list[tuple[str, str, pl.DataFrame, pl.DataFrame, str | None]]) -> alt.TopLevelMixin:
    """Funnel plots, one panel per (title, subtitle, unit points, limit curve, note): each unit's rate against
    its denominator inside 95 % and 99.8 % limits around the centre, coloured by where it falls; units
    beyond the 95 % limits are named. A panel with nothing to compare says why inside it."""
    frames, order = [], []
    for title, subtitle, points, curve, note in panels:
        shown = points.filter(pl.col("rate").is_not_null()) if points.height else points
        if note is None and (curve.is_empty() or shown.is_empty()):
            note = (
                "no unit with a denominator"
                if points.is_empty()
                else "rates or the centre line suppressed (small counts)"
            )
        if note is None and shown.height < points.height:
            subtitle = f"{subtitle} · {points.height - shown.height} of {points.height} units suppressed"
        label = _panel_label(title, subtitle)
        order.append(label)
        if note is not None:
            frames.append(pl.DataFrame({"panel": [label], "kind": ["note"], "note": [note]}))
            continue
        frames.append(
            curve.select(
                pl.lit(label).alias("panel"),
                pl.lit("curve").alias("kind"),
                pl.col("volume").cast(pl.Float64).alias("x"),
                "overall_rate",
                "lower_95",
                "upper_95",
                "lower_998",
                "upper_998",
            )
        )
        frames.append(
            shown.select(
                pl.lit(label).alias("panel"),
                pl.lit("unit").alias("kind"),
                pl.col("denominator").cast(pl.Float64).alias("x"),
                "unit",
                "rate",
                "position",
            ).with_columns(
                pl.col("position")
                .map_elements(funnel_band, return_dtype=pl.String)
                .fill_null(FUNNEL_BANDS[0])
                .alias("band"),
                # a long unit name is cut with an ellipsis, so the label does not read as a whole name
                pl.when(pl.col("unit").str.len_chars() > 22)
                .then(pl.col("unit").str.slice(0, 21) + "\u2026")
                .otherwise(pl.col("unit"))
                .alias("label"),
            )
        )
    data = pl.concat(frames, how="diagonal_relaxed")
    x = alt.X(
        "x:Q",
        title="denominator",
        scale=alt.Scale(type="log", nice=False),
        axis=alt.Axis(labelFontSize=8.5, tickCount=4, titleFontSize=9),
    )
    y_scale = alt.Scale(zero=False)
    y_axis = alt.Axis(format=".0~%", title=None, tickCount=4, labelFontSize=8.5)
    curves = alt.Chart().transform_filter("datum.kind == 'curve'")
    lines = [
        curves.mark_line(color=LIMIT_COLOUR, strokeDash=dash, strokeWidth=1).encode(
            x=x, y=alt.Y(f"{column}:Q", axis=y_axis, scale=y_scale)
        )
        for column, dash in (("lower_95", [4, 3]), ("upper_95", [4, 3]), ("lower_998", [1, 0]), ("upper_998", [1, 0]))
    ]
    centre = curves.mark_line(color=CENTRE_COLOUR, strokeWidth=1).encode(x=x, y=alt.Y("overall_rate:Q", scale=y_scale))
    units = alt.Chart().transform_filter("datum.kind == 'unit'")
    dots = units.mark_point(filled=True, size=42, opacity=1).encode(
        x=x,
        y=alt.Y("rate:Q", scale=y_scale),
        color=alt.Color("band:N", scale=alt.Scale(domain=list(FUNNEL_BANDS), range=list(FUNNEL_COLOURS)), legend=None),
        tooltip=[
            alt.Tooltip("unit:N"),
            alt.Tooltip("x:Q", title="denominator"),
            alt.Tooltip("rate:Q", format=".1%"),
            alt.Tooltip("position:N"),
        ],
    )
    labels = (
        units.transform_filter(f"datum.band != '{FUNNEL_BANDS[0]}'")
        .mark_text(align="left", dx=5, dy=-5, fontSize=8.5, color=CENTRE_COLOUR)
        .encode(x=x, y=alt.Y("rate:Q", scale=y_scale), text="label:N")
    )
    note = (
        alt.Chart()
        .transform_filter("datum.kind == 'note'")
        .mark_text(fontSize=10.5, color=CENTRE_COLOUR, fontStyle="italic")
        .encode(x=alt.value(PANEL_WIDTH / 2), y=alt.value(FUNNEL_HEIGHT / 2), text="note:N")
    )
    return (
        alt.layer(*lines, centre, dots, labels, note, data=data)
        .properties(width=PANEL_WIDTH, height=FUNNEL_HEIGHT)
        .facet(facet=_facet(order), columns=PANELS_PER_ROW, spacing={"row": 14, "column": 22})
        .resolve_scale(x="independent", y="independent")
        .resolve_axis(x="independent", y="independent")
        .configure_view(stroke=None)
        .configure_axis(domainColor="#9aa5b1", tickColor="#9aa5b1")
    )


# --------------------------------------------------------------------------------------
# The HTML report
# --------------------------------------------------------------------------------------


def _number(value: Any, kind: str) -> str:
    if kind == "pct":
        return f"{value * 100:.1f} %"
    if kind == "pct0":
        # whole percent, with one decimal where rounding would say 0 % or 100 % of something that is not
        pct = value * 100
        return f"{pct:.1f} %" if 0 < pct < 10 or 90 < pct < 100 else f"{pct:.0f} %"
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
    """Per measure: rows = places (units by type, each type's row, all units), columns = periods."""
    blocks = []
    partial = set(rates.filter(pl.col("partial_period") & ~pl.col("all_periods"))["period"].to_list())
    for (measure,), group in rates.sort("sort_order").group_by("measure", maintain_order=True):
        places = (
            group.select("unit", "all_units", "unit_type")
            .unique(maintain_order=True)
            .sort(
                pl.col("all_units") & pl.col("unit_type").is_null(),
                pl.col("unit_type").is_null(),
                "unit_type",
                "all_units",
                "unit",
            )
        )
        table = []
        for place in places.to_dicts():
            cells = {r["period"]: r for r in group.filter(pl.col("unit") == place["unit"]).to_dicts()}
            table.append(
                {
                    "unit": place["unit"],
                    "total": place["all_units"],
                    "cells": [cells.get(p) for p in periods],
                    "window": cells.get("all periods"),
                }
            )
        first = group.row(0, named=True)
        blocks.append(
            {
                "measure": measure,
                "title": first["title"],
                "definition": first.get("definition"),
                "level_words": LEVEL_WORDS.get(first["level"], first["level"]),
                "rows": table,
                "periods": [(p, p in partial) for p in periods],
            }
        )
    return blocks


def _contract(con: duckdb.DuckDBPyConnection, run_id: str) -> dict[str, Any] | None:
    """This run's incoming-batch contract results in words: how many files and checks, and each check that
    failed somewhere with how many files and values (file names only, never their folders)."""
    if not _has_table(con, "contract_results"):
        return None
    results = _table(con, "contract_results")
    if results.is_empty():
        return None
    earlier = results.height
    if "run_id" in results.columns:
        results = results.filter(pl.col("run_id") == run_id)
        earlier -= results.height
    for name, dtype in (
        ("source_file", pl.String),
        ("column_name", pl.String),
        ("severity", pl.String),
        ("blocking", pl.Boolean),
        ("element_count", pl.Int64),
        ("missing_count", pl.Int64),
        ("unexpected_count", pl.Int64),
        ("unexpected_percent", pl.Float64),
        ("observed", pl.String),
    ):
        if name not in results.columns:
            results = results.with_columns(pl.lit(None, dtype=dtype).alias(name))
    results = results.with_columns(
        pl.col("source_file").str.replace(r"^.*[/\\]", "").alias("file"),
        # 'observed' reads '3 of 120 values outside 6.5-8': what the check wants is the words after the counts
        pl.col("observed").str.replace(r"^\d+ of \d+ (values|rows) ", "").alias("wanted"),
        (pl.col("element_count") - pl.col("missing_count").fill_null(0)).alias("tested"),
    )
    failed = results.filter(~pl.col("success").fill_null(False))
    checks = []
    for (check_id,), group in failed.group_by("check_id", maintain_order=True):
        first = group.row(0, named=True)
        values = group["unexpected_count"].drop_nulls()
        tested = group["tested"].drop_nulls()
        share = values.sum() / tested.sum() if len(values) and tested.sum() else None
        checks.append(
            {
                "check_id": check_id,
                "column": first["column_name"] or "the batch",
                "wanted": first["wanted"] or "",
                "severity": first["severity"] or "",
                "files": group["file"].n_unique(),
                "value_count": int(values.sum()) if len(values) else None,
                "tested": int(tested.sum()) if len(tested) else None,
                "share": share,
                "rejected": int(group.filter(pl.col("blocking").fill_null(False))["file"].n_unique()),
                "lines": [
                    f"{r['file']}: {r['observed']}"
                    + (f" ({r['unexpected_percent']:.1f} %)" if r["unexpected_percent"] is not None else "")
                    for r in group.head(50).to_dicts()
                ],
            }
        )
    checks.sort(key=lambda c: (c["severity"] != "critical", -c["files"]))
    return {
        "total": results.height,
        "files": results["file"].n_unique(),
        "passed": results.height - failed.height,
        "failed_files": failed["file"].n_unique(),
        "checks": checks,
        "earlier": earlier,
    }


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


def _definitions(config: SiteConfig, derive: dict[str, Any], k: int) -> list[tuple[str, str]]:
    s = config.audit
    hypoxaemia_limits = (
        f"PaO2 < {derive['hypoxaemia_pao2_mmhg']:g} mmHg (8 kPa, respiratory failure) or arterial saturation < "
        f"{derive['hypoxaemia_sat_pct']:g} %"
    )
    return [
        (
            "Oxygen target range",
            "A target range prescribed on a linked oxygen prescription applies first. Otherwise it is inferred, "
            "in this order: "
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
            "Sample rates count each blood gas once; episode rates count each encounter (or patient-day where no "
            "encounter is exported) once, in the unit and period of its first sample. No rate is adjusted for "
            "case mix.",
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
            "the rate of the units of its type, or of all units where the audit has no unit types (normal "
            "approximation; Spiegelhalter DJ 2005, Stat Med 24:1185, from memory). Limits are widened for "
            f"over-dispersion, the spread between units beyond chance (site setting: {s.funnel_overdispersion}; "
            "multiplicative: phi, additive: tau-squared from winsorised z-scores, Spiegelhalter 2005); each panel "
            "names the method and its estimate.",
        ),
        (
            "Small-cell suppression",
            f"No count from 1 to {k - 1} is shown (US CMS cell size suppression "
            "policy: no cell 1-10 shown or derivable; threshold configurable), nor a numerator whose "
            "denominator minus numerator is that small, nor any rate, interval or limit derived from a hidden "
            "count. Complementary suppression then hides one more count in every unit row, period column and "
            "sum (status, exclusion, sample-type, age-group and oxygen-documentation splits, P/F bands) that would "
            "otherwise let a hidden count be recovered from its total, and more counts wherever several sums taken "
            "together would still give a hidden count away (checked by linear algebra over every published sum). "
            f"Hidden cells show '{SUPPRESSED}' here, in CSV and in Excel; 0 is a real zero.",
        ),
        (
            "Reporting window",
            f"The latest {s.history_periods} {s.period}s with data"
            + (
                ", leaving out the period still under way."
                if s.complete_periods_only
                else "; the period still under way is shown and labelled partial (its counts are incomplete)."
            )
            + " Times are collection times in UTC.",
        ),
    ]


# --------------------------------------------------------------------------------------
# The answers: one section per question, rates per unit type
# --------------------------------------------------------------------------------------

# Report sections in the order people ask; a question the coordinator adds later comes after these.
QUESTIONS: dict[str, tuple[str, str]] = {
    "prescribing": (
        "Oxygen prescribing",
        "Were patients on oxygen prescribed it, with a target range, and was their saturation kept inside it?",
    ),
    "oxygenation": (
        "Oxygenation",
        "How often were patients hypoxaemic, above their target or hyperoxaemic on oxygen, and how often was "
        "the A-a gradient above the age-expected limit?",
    ),
    "documentation": (
        "Documentation of oxygen",
        "How complete and believable are the FiO2 and oxygen device typed beside each result?",
    ),
    "episodes": (
        "Episodes",
        "Counting each encounter (or patient-day where no encounter is exported) once: how did the first sample "
        "look, and was there any hypoxaemia or any saturation out of target?",
    ),
}
LEVEL_WORDS = {"sample": "per sample", "episode": "per episode"}
LEVEL_NOUNS = {"sample": "samples", "episode": "episodes"}


def _with_contract_columns(rates: pl.DataFrame, partial: set[str]) -> pl.DataFrame:
    """``audit_rates`` with the columns the report reads, filled in when an older audit lacks them:
    each ``basis`` its own question, every rate per sample, no unit types, the partial period from
    the store."""
    missing: list[pl.Expr] = []
    if "question" not in rates.columns:
        missing.append(pl.col("basis").alias("question"))
    if "level" not in rates.columns:
        missing.append(pl.lit("sample").alias("level"))
    if "unit_type" not in rates.columns:
        missing.append(pl.lit(None, dtype=pl.String).alias("unit_type"))
    if "partial_period" not in rates.columns:
        missing.append(pl.col("period").is_in(sorted(partial)).alias("partial_period"))
    return rates.with_columns(missing) if missing else rates


def _type_words(unit_type: str | None) -> str:
    return (unit_type or "unassigned").replace("_", " ")


def suppression_reason(k: int, level: str) -> str:
    return f"a count of 1 to {k - 1} {LEVEL_NOUNS.get(level, 'records')}, or a value that would reveal one"


def rate_block(row: dict[str, Any] | None, k: int) -> Markup:
    """An answer cell: the rounded rate with its counts, then its Wilson interval; or the suppressed
    marker with the reason; or a dash when there is no denominator."""
    if row is None:
        return Markup('<span class="na">&ndash;</span>')
    hidden = set((row.get("suppressed_columns") or "").split(", "))
    level = row.get("level") or "sample"
    if "numerator" in hidden or "denominator" in hidden:
        reason = suppression_reason(k, level)
        shown_n = "" if "denominator" in hidden else f"; n {_number(row['denominator'], 'count')}"
        return Markup(
            f'<span class="supp" title="{escape(reason)}">{SUPPRESSED}</span>'
            f'<span class="why">{escape(f"under {k} or would reveal one{shown_n}")}</span>'
        )
    if row.get("rate") is None:
        return Markup(f'<span class="na">&ndash;</span><span class="why">no {LEVEL_NOUNS.get(level, "records")}</span>')
    numerator, denominator = _number(row["numerator"], "count"), _number(row["denominator"], "count")
    interval = f"{_number(row['ci_low'], 'pct0')}&ndash;{_number(row['ci_high'], 'pct0')}"
    return Markup(
        f'<span class="rate">{escape(_number(row["rate"], "pct0"))}</span> '
        f'<span class="counts">{escape(numerator)}/{escape(denominator)}</span>'
        f'<span class="ci" title="Wilson 95 % interval">95 % CI {interval}</span>'
    )


def _has_denominator(row: dict[str, Any] | None) -> bool:
    if row is None:
        return False
    hidden = set((row.get("suppressed_columns") or "").split(", "))
    return "denominator" in hidden or bool(row.get("denominator"))


def _place_kind(row: dict[str, Any]) -> str:
    if not row["all_units"]:
        return "unit"
    return "type" if row.get("unit_type") is not None else "site"


def answer_tables(rates: pl.DataFrame) -> list[dict[str, Any]]:
    """Per question: its measures (title, level, definition) and the whole-window rate of every place,
    units grouped by unit type with the type's own row, then all units."""
    window = rates.filter(pl.col("all_periods"))
    order = list(QUESTIONS)
    seen = rates.sort("sort_order")["question"].unique(maintain_order=True).to_list()
    questions = [q for q in order if q in seen] + [q for q in seen if q not in order]
    result = []
    for question in questions:
        rows = window.filter(pl.col("question") == question).sort("sort_order")
        measures = (
            rates.filter(pl.col("question") == question)
            .sort("sort_order")
            .select("measure", "title", "level", "definition")
            .unique(subset="measure", maintain_order=True)
            .to_dicts()
        )
        for m in measures:
            m["level_words"] = LEVEL_WORDS.get(m["level"], f"per {m['level']}")
        by_place: dict[str, dict[str, dict[str, Any]]] = {}
        kinds: dict[str, tuple[str, str | None]] = {}
        for row in rows.to_dicts():
            by_place.setdefault(row["unit"], {})[row["measure"]] = row
            kinds[row["unit"]] = (_place_kind(row), row.get("unit_type"))

        def line(place: str, kind: str, by_place=by_place, measures=measures) -> dict[str, Any]:
            return {"unit": place, "kind": kind, "cells": [by_place[place].get(m["measure"]) for m in measures]}

        types = sorted(
            {t for kind, t in kinds.values() if kind in ("unit", "type")},
            key=lambda t: (t is None or t == "unassigned", t or ""),
        )
        groups, empty = [], []
        has_type_rows = any(kind == "type" for kind, _ in kinds.values())
        for unit_type in types:
            units = sorted(p for p, (kind, t) in kinds.items() if kind == "unit" and t == unit_type)
            # a unit with no denominator in any of these measures (e.g. a neonatal unit in adult measures) is
            # named below the table instead of a row of dashes
            empty += [u for u in units if not any(_has_denominator(c) for c in line(u, "unit")["cells"])]
            units = [u for u in units if u not in empty]
            total = next((p for p, (kind, t) in kinds.items() if kind == "type" and t == unit_type), None)
            if not units:
                continue
            groups.append(
                {
                    "unit_type": unit_type,
                    "heading": f"{_type_words(unit_type).capitalize()} units" if has_type_rows else None,
                    "units": [line(u, "unit") for u in units],
                    # one unit: the type's row would repeat it
                    "total": line(total, "type") if total and len(units) > 1 else None,
                }
            )
        site = next((p for p, (kind, _) in kinds.items() if kind == "site"), None)
        title, ask = QUESTIONS.get(question, (question.replace("_", " ").capitalize(), ""))
        result.append(
            {
                "key": question,
                "title": title,
                "ask": ask,
                "measures": measures,
                "groups": groups,
                "site": line(site, "site") if site else None,
                "empty": empty,
            }
        )
    return result


def _chart_places(rates: pl.DataFrame) -> tuple[list[str], list[str]]:
    """Places whose control charts are shown open (all units), and those drawn apart, collapsed: each unit
    type's row, then each unit."""
    window = rates.filter(pl.col("all_periods")).select("unit", "all_units", "unit_type").unique(maintain_order=True)
    site = window.filter(pl.col("all_units") & pl.col("unit_type").is_null())["unit"].to_list()
    types = window.filter(pl.col("all_units") & pl.col("unit_type").is_not_null()).sort("unit_type")["unit"].to_list()
    units = window.filter(~pl.col("all_units")).sort("unit_type", "unit", nulls_last=True)["unit"].to_list()
    return site, types + units


def _subtitle(place: str, level: str) -> str:
    return f"{place} · {LEVEL_WORDS.get(level, level)}"


def control_charts(
    question: dict[str, Any],
    chart: pl.DataFrame,
    places: tuple[list[str], list[str]],
    starts: list[date],
    config: SiteConfig,
    partial: set[str],
    prefix: str,
) -> dict[str, Any]:
    """The question's control charts: all units open, each unit type and unit apart."""
    open_places, other_places = places
    open_panels, other_panels = [], []
    for m in question["measures"]:
        points = chart.filter(pl.col("measure") == m["measure"])
        for place in open_places:
            open_panels.append(
                (m["title"], _subtitle(place, m["level"]), points.filter(pl.col("unit") == place).sort("period_start"))
            )
        for place in other_places:
            other_panels.append(
                (m["title"], _subtitle(place, m["level"]), points.filter(pl.col("unit") == place).sort("period_start"))
            )
    signals = (
        chart.filter(
            pl.col("measure").is_in([m["measure"] for m in question["measures"]]) & pl.col("signals").is_not_null()
        )
        .sort("sort_order", "unit", "period_start")
        .select("title", "unit", "period", "signals")
        .to_dicts()
    )
    period, limits = config.audit.period, config.audit.chart_limits

    def draw(panels: list[tuple[str, str, pl.DataFrame]], name: str) -> Markup | None:
        if not panels or not starts:
            return None
        return svg_markup(control_chart(panels, starts, period, limits, partial), f"{prefix}{name}")

    return {"svg": draw(open_panels, "c"), "unit_svg": draw(other_panels, "u"), "signals": signals}


def _overdispersion_words(rows: pl.DataFrame) -> str:
    if rows.is_empty() or "overdispersion" not in rows.columns:
        return "limits from the binomial alone"
    first = rows.row(0, named=True)
    method = first.get("overdispersion") or "none"
    if method == "additive" and first.get("tau2") is not None:
        return f"additive over-dispersion, tau\u00b2 {first['tau2']:.2g}"
    if method == "multiplicative" and first.get("phi") is not None:
        return f"multiplicative over-dispersion, phi {first['phi']:.2f}"
    return "no over-dispersion allowance" if method == "none" else f"{method} over-dispersion"


def funnel_charts(question: dict[str, Any], funnel: pl.DataFrame, curve: pl.DataFrame, prefix: str) -> dict[str, Any]:
    """Per measure and unit type, each unit's whole-window rate against its denominator."""
    panels: list[tuple[str, str, pl.DataFrame, pl.DataFrame, str | None]] = []
    outliers: list[dict[str, Any]] = []
    alone: dict[str, list[str]] = {}  # unit type -> the measures it has one unit with data for
    for m in question["measures"]:
        points = funnel.filter(pl.col("measure") == m["measure"])
        lines = curve.filter(pl.col("measure") == m["measure"])
        types = sorted(points["unit_type"].unique().to_list(), key=lambda t: (t is None or t == "unassigned", t or ""))
        for unit_type in types:
            group = points.filter(pl.col("unit_type").eq_missing(unit_type)).sort("unit")
            group_lines = (
                lines.filter(pl.col("unit_type").eq_missing(unit_type)) if "unit_type" in lines.columns else lines
            ).sort("volume")
            typed = len(types) > 1 or unit_type not in (None, "unassigned")
            place = f"{_type_words(unit_type)} units" if typed else "all units"
            subtitle = f"{place} · {LEVEL_WORDS.get(m['level'], m['level'])} · {_overdispersion_words(group)}"
            if group.height < 2 and typed:
                # one unit of its type: nothing to compare it with (its rate is in the answers table)
                alone.setdefault(_type_words(unit_type), []).append(m["title"])
                continue
            panels.append((m["title"], subtitle, group, group_lines, None))
            for row in group.filter(pl.col("position").str.contains("99.8").fill_null(False)).to_dicts():
                outliers.append({**row, "title": m["title"]})
    return {
        "svg": svg_markup(funnel_chart(panels), f"{prefix}f") if panels else None,
        "outliers": outliers,
        "alone": _alone_words(alone, len(question["measures"])),
    }


def _alone_words(alone: dict[str, list[str]], measures: int) -> list[str]:
    """Each unit type not drawn, with the measures it is not drawn for unless that is all of them: a type
    can have two units with data for one measure and one unit for another."""
    return [
        f"{unit_type} units" if len(titles) == measures else f"{unit_type} units for {', '.join(map(_in_text, titles))}"
        for unit_type, titles in sorted(alone.items())
    ]


def _in_text(title: str) -> str:
    """A title inside a sentence: its capital dropped unless its first word is an abbreviation (FiO2, A-a, P/F)."""
    rest = title.split(" ", 1)[0].rstrip(":,")[1:]
    return title[0].lower() + title[1:] if rest.isalpha() and rest.islower() else title


def _period_frame(rates: pl.DataFrame) -> list[dict[str, Any]]:
    """The window's periods, oldest first: label, first day, partial."""
    return (
        rates.filter(~pl.col("all_periods"))
        .select(
            "period", pl.col("period_start").cast(pl.Date).alias("start"), pl.col("partial_period").alias("partial")
        )
        .unique(subset="period")
        .sort("start")
        .to_dicts()
    )


def _partial_fallback(con: duckdb.DuckDBPyConnection, config: SiteConfig, rates: pl.DataFrame) -> set[str]:
    """When the audit tables do not say which period is still under way: the latest period is partial when
    the latest collection day falls before its last day (the rule of the reporting window, 08_audit_window.sql)."""
    if "partial_period" in rates.columns:
        return set(rates.filter(pl.col("partial_period") & ~pl.col("all_periods"))["period"].to_list())
    periods = rates.filter(~pl.col("all_periods")).sort("period_start")
    if periods.is_empty():
        return set()
    latest = periods.row(-1, named=True)
    start = latest["period_start"]
    start = start.date() if isinstance(start, datetime) else start
    if config.audit.period == "week":
        last_day = start + timedelta(days=6)
    else:
        last_day = (start.replace(day=28) + timedelta(days=4)).replace(day=1) - timedelta(days=1)
    rows = con.execute("select cast(max(collected_at) as date) from records").fetchall()
    latest_day = rows[0][0] if rows else None
    return {latest["period"]} if latest_day is not None and latest_day < last_day else set()


def render_report(
    con: duckdb.DuckDBPyConnection, config: SiteConfig, run_id: str, audience: Audience | None = None
) -> str:
    """The self-contained HTML report for the store's current audit tables, written for ``audience``."""
    audience = audience or publication(config)
    k = audience.threshold
    catalogue = load_catalogue(config.thresholds)
    volume = _table(con, "audit_volume")
    raw_rates = _table(con, "audit_rates")
    chart = _table(con, "audit_control_chart")
    funnel = _table(con, "audit_funnel")
    curve = _table(con, "audit_funnel_curve")
    flag_rates = _table(con, "audit_flag_rates")
    bands = _table(con, "audit_pf_bands")
    ages = _table(con, "audit_age_groups")
    qc = _table(con, "audit_analyser_qc")
    reconciliation = _table(con, "audit_run_reconciliation")
    rules = _table(con, "rule_catalogue")
    worklist_rows = con.execute("select count(*), is_small_cell(count(*), ?) from review_worklist", [k]).fetchall()[0]
    run = con.execute(
        "select command, started_at, finished_at, outcome, summary from runs where run_id = ?", [run_id]
    ).fetchall()
    latest_day = con.execute("select cast(max(collected_at) as date) from records").fetchall()[0][0]

    partial = _partial_fallback(con, config, raw_rates)
    rates = _with_contract_columns(raw_rates, partial)
    if "unit_type" not in funnel.columns:
        funnel = funnel.with_columns(pl.lit(None, dtype=pl.String).alias("unit_type"))
    period_rows = _period_frame(rates)
    periods = [p["period"] for p in period_rows]
    starts = [p["start"] for p in period_rows]
    recent = periods[-12:]
    total = volume.filter(pl.col("all_units") & pl.col("all_periods"))
    if "unit_type" in volume.columns:
        total = total.filter(pl.col("unit_type").is_null())
    total_row = total.to_dicts()
    age_total = ages.filter(pl.col("all_units") & pl.col("all_periods"))
    if "unit_type" in ages.columns:
        age_total = age_total.filter(pl.col("unit_type").is_null())
    age_total_row = age_total.to_dicts()
    latest = periods[-1] if periods else None

    places = _chart_places(rates)
    questions = answer_tables(rates)
    for index, question in enumerate(questions):
        question["control"] = control_charts(question, chart, places, starts, config, partial, f"q{index}")
        question["funnel"] = funnel_charts(question, funnel, curve, f"q{index}")

    signal_count = chart.filter(pl.col("signals").is_not_null()).height
    latest_signals = (
        chart.filter((pl.col("period") == latest) & pl.col("signals").is_not_null()).to_dicts() if latest else []
    )
    dq_rules = rules.filter(pl.col("kind").is_in(["data_quality", "documentation"]))
    flags_total = flag_rates.filter(pl.col("all_periods"))
    volume_units = volume.filter(~pl.col("all_units"))["unit"].unique(maintain_order=True).to_list()
    flag_matrix = []
    severity_order = {"high": 0, "medium": 1, "low": 2, "info": 3}
    ordered = sorted(dq_rules.to_dicts(), key=lambda r: (severity_order.get(r["severity"], 9), r["rule_id"]))
    for rule in ordered:
        rows = {r["unit"]: r for r in flags_total.filter(pl.col("rule_id") == rule["rule_id"]).to_dicts()}
        flag_matrix.append({"rule": rule, "cells": [rows.get(u) for u in volume_units], "total": rows.get("All units")})
    flagged_rules = [r for r in flag_matrix if r["total"] and (r["total"].get("flagged_samples") or 0) > 0]
    band_rows = bands.filter(pl.col("all_periods")).sort("all_units", "unit", "sort_order")
    band_matrix = []
    for unit in [*volume_units, "All units"]:
        rows = band_rows.filter(pl.col("unit") == unit).to_dicts()
        if rows:
            band_matrix.append({"unit": unit, "cells": rows})
    qc_rows = _rows(qc)

    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATES),
        autoescape=jinja2.select_autoescape(["html", "j2"], default_for_string=True),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.globals.update(cell=cell, rate_with_counts=rate_with_counts, number=_number, rate_block=rate_block)
    template = env.get_template("audit_report.html.j2")
    return template.render(
        caution=CAUTION,
        limits=LIMITS,
        audience=audience,
        page_label=_css_text(audience.label),
        site_name=config.site_name,
        run_id=run_id,
        run=run[0] if run else None,
        generated_at=datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
        version=__version__,
        settings=config.audit,
        k=k,
        periods=periods,
        partial=partial,
        recent=recent,
        window=_window_words(period_rows, config.audit.period, latest_day),
        total=total_row[0] if total_row else None,
        age_total=age_total_row[0] if age_total_row else None,
        latest=latest,
        signal_count=signal_count,
        latest_signals=latest_signals,
        questions=questions,
        rate_blocks=_pivot_rates(rates, recent),
        volume=_rows(volume.filter(pl.col("all_periods") | pl.col("period").is_in(recent))),
        units=volume_units,
        flag_matrix=flag_matrix,
        flagged_rules=flagged_rules,
        band_matrix=band_matrix,
        ages=_rows(ages.filter(pl.col("all_periods") | pl.col("period").is_in(recent))),
        worklist_count=None if worklist_rows[1] else worklist_rows[0],
        worklist_path=f"{RESTRICTED_DIR}/review_worklist.csv",
        qc=qc_rows,
        qc_signals=[q for q in qc_rows if q["blocks_outside_limits"]],
        rules=_rows(rules.sort("kind", "rule_id")),
        contract=_contract(con, run_id),
        reconciliation=_reconciliation(reconciliation),
        definitions=_definitions(config, catalogue.derive, k),
        parameters=lambda text: ", ".join(f"{k} {v}" for k, v in json.loads(text or "{}").items()),
        funnel_legend=list(zip(FUNNEL_BANDS, FUNNEL_COLOURS, strict=True)),
        colours={
            "rate": RATE_COLOUR,
            "signal": SIGNAL_COLOUR,
            "limit": LIMIT_COLOUR,
            "centre": CENTRE_COLOUR,
            "band": BAND_COLOUR,
        },
    )


def _css_text(text: str) -> Markup:
    """Text safe inside a CSS string in a <style> element (no quote, backslash or markup)."""
    return Markup(re.sub(r"[^\w .,;:()%/+-]", " ", text.replace("'", "\u2019")))


def _window_words(period_rows: list[dict[str, Any]], period: str, latest_day: date | None) -> str | None:
    """'2026-W02 to 2026-W10 (weekly; 5 Jan to 4 Mar 2026, the last week partial)'."""
    if not period_rows:
        return None
    first, last = period_rows[0], period_rows[-1]
    span = f"{first['period']} to {last['period']}" if first is not last else first["period"]
    days = f"from {first['start']:%d %b %Y}"
    if latest_day is not None:
        days += f", data to {latest_day:%d %b %Y}"
    unit = "week" if period == "week" else "month"
    note = f"; the last {unit} is still under way (partial)" if last["partial"] else ""
    return f"{span} ({unit}ly; {days}{note})"


# --------------------------------------------------------------------------------------
# Entry points
# --------------------------------------------------------------------------------------


def _header(config: SiteConfig, run_id: str, audience: Audience) -> list[tuple[str, str]]:
    """The first rows of every workbook's about sheet and every file's metadata: who the file is for, the
    caution, who is counted, what the audit cannot know, the run."""
    return [
        ("Audience", audience.label),
        ("Caution", CAUTION),
        ("Who is counted", SELECTION),
        *((f"Cannot know: {title.lower()}", text) for title, text in LIMITS),
        ("Site", config.site_name),
        ("Run", run_id),
        ("Generated", datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")),
    ]


def _about(config: SiteConfig, run_id: str, audience: Audience) -> list[tuple[str, str]]:
    return [
        *_header(config, run_id, audience),
        ("Period", f"{config.audit.period}; latest {config.audit.history_periods} periods with data"),
        (
            "Suppressed cells",
            f"'{SUPPRESSED}': a count from 1 to {audience.threshold - 1}, or a value from which one could be "
            "derived (US CMS cell size suppression policy). 0 is a real zero; an empty cell means not defined.",
        ),
        ("Row-level data", "None. The laboratory's review worklist is kept apart, in the restricted folder."),
    ]


def file_metadata(about: list[tuple[str, str]], table: str) -> dict[str, str]:
    """Key-value metadata of one table file (Parquet footer, CSV sidecar): the about rows, keyed plainly."""
    meta = {"table": table}
    meta.update({re.sub(r"[^a-z0-9]+", "_", key.lower()).strip("_"): value for key, value in about})
    return meta


def _write_csv_metadata(path: Path, meta: dict[str, str], mode: int) -> Path:
    """A CSV cannot carry metadata: it goes beside it, named as CSV on the Web (W3C) names a sidecar."""
    document = {
        "@context": "http://www.w3.org/ns/csvw",
        "url": path.name,
        "dc:title": meta["table"],
        "dc:audience": meta["audience"],
        "dc:publisher": meta.get("site", ""),
        "dc:created": meta.get("generated", ""),
        "dc:description": f"{meta['caution']} {meta['who_is_counted']}",
        "notes": meta,
    }
    sidecar = path.with_name(f"{path.name}-metadata.json")
    text = json.dumps(document, indent=2, ensure_ascii=False)
    return atomic_write(sidecar, lambda tmp: tmp.write_text(text, encoding="utf-8"), mode)


def _write_table(frame: pl.DataFrame, folder: Path, name: str, about: list[tuple[str, str]], mode: int) -> list[Path]:
    meta = file_metadata(about, name)
    parquet = atomic_write(folder / f"{name}.parquet", lambda tmp: frame.write_parquet(tmp, metadata=meta), mode)
    csv = _write_csv(frame, folder / f"{name}.csv", mode)
    return [parquet, csv, _write_csv_metadata(csv, meta, mode)]


def write_outputs(
    con: duckdb.DuckDBPyConnection,
    config: SiteConfig,
    run_id: str,
    log: Log,
    audience: Audience | None = None,
) -> list[Path]:
    """Write every published table (Parquet, CSV with its metadata sidecar), the workbook, the HTML report and
    the restricted worklist into ``audience.folder``; every file states whom it is for."""
    audience = audience or publication(config)
    out = audience.folder
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
        about = _about(config, run_id, audience)
        frames = {name: _table(con, name) for name in PUBLISHED_TABLES}
        for name, frame in frames.items():
            written.extend(_write_table(frame, out / TABLES_DIR, name, about, 0o640))
        written.append(_write_workbook(out / WORKBOOK_NAME, about, frames, 0o640))
        for name in RESTRICTED_TABLES:
            frame = _table(con, name)
            header = [
                *_header(config, run_id, audience),
                ("Restricted", "Row level, pseudonymised; laboratory use only."),
            ]
            written.extend(_write_table(frame, restricted, name, header, 0o600))
            written.append(_write_workbook(restricted / f"{name}.xlsx", header, {name: frame}, 0o600))
        html = render_report(con, config, run_id, audience)
        written.append(atomic_write(out / REPORT_NAME, lambda tmp: tmp.write_text(html, encoding="utf-8"), 0o640))
    except OSError as err:
        raise StorageError(f"cannot write the outputs in {out}: {err.strerror or err}") from None
    log.info(
        f"audit outputs for {audience.name} written to {out} ({len(written)} files; report {REPORT_NAME})",
        outputs=len(written),
    )
    return written


def latest_run_id(con: duckdb.DuckDBPyConnection) -> str:
    rows = con.execute("select run_id from runs order by started_at desc, run_id desc limit 1").fetchall()
    if not rows:
        raise StorageError("the store records no run yet; run the pipeline first")
    return str(rows[0][0])


def rebuild_outputs(config: SiteConfig, log: Log) -> list[Path]:
    """Rebuild the audit tables and every output from the store, loading nothing (``abg-audit report``),
    for each audience (pipeline/publish.py)."""
    from pipeline.publish import build_and_write
    from pipeline.run import run_lock
    from pipeline.store import open_store

    if not config.store_path.exists():
        raise StorageError(f"no store at {config.store_path}; run the pipeline first")
    catalogue = load_catalogue(config.thresholds)
    with run_lock(config.store_path):
        con = open_store(config.store_path)
        try:
            run_id = latest_run_id(con)
            return build_and_write(con, config, catalogue, run_id, log)
        finally:
            con.close()


def published_files(folder: Path) -> Iterable[Path]:
    """Every output file outside the restricted folder."""
    return (p for p in folder.rglob("*") if p.is_file() and RESTRICTED_DIR not in p.relative_to(folder).parts)
