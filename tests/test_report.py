"""Outputs of the audit: files, suppressed markers, formula guard, workbook, the offline HTML
report (rendered in headless Chromium with every host name unresolvable and a network log),
no raw patient identifier anywhere, and the ``report`` command and nightly-run hook.
"""

from __future__ import annotations

import dataclasses
import json
import os
import re
import shutil
import stat
import subprocess
import zipfile
from datetime import datetime
from html import unescape
from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import pytest
from click.testing import CliRunner
from statsmodels.stats.proportion import proportion_confint

from pipeline.audience import Audience
from pipeline.audit import PUBLISHED_TABLES, RESTRICTED_TABLES
from pipeline.log import Log
from pipeline.report import (
    CAUTION,
    LIMITS,
    REPORT_NAME,
    RESTRICTED_DIR,
    SUPPRESSED,
    TABLES_DIR,
    WORKBOOK_NAME,
    csv_frame,
    published_files,
    render_report,
    write_outputs,
)
from synthetic_data import generate
from synthetic_data.hospital import UNIT_TYPES
from tests.audit_store import RUN_ID, audit, audit_config, build_store, oxygen_store

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
ROOT = Path(__file__).resolve().parent.parent
INJECTED_UNIT = '=HYPERLINK("http://example.invalid","ward")'
CAUTION_WORDS = "an audit aid, not a diagnostic device; thresholds follow local policy and licensed clinical judgement"


@pytest.fixture(autouse=True)
def keep_umask():
    """The command line sets an owner-only umask in its own process (CliRunner runs it in this one)."""
    mask = os.umask(0o022)
    os.umask(mask)
    yield
    os.umask(mask)


@pytest.fixture(scope="module")
def site(tmp_path_factory) -> dict[str, Any]:
    """A store of invented records (one unit renamed to a spreadsheet formula) and its written outputs."""
    tmp = tmp_path_factory.mktemp("report")
    records, _ = generate(rows=2500, seed=5, days=63)
    records = records.with_columns(
        pl.when(pl.col("unit") == "Sandpiper Surgical Ward")
        .then(pl.lit(INJECTED_UNIT))
        .otherwise(pl.col("unit"))
        .alias("unit")
    )
    # the demo site's unit types (its configuration is written from the same table)
    config = dataclasses.replace(audit_config(tmp, k=11, period="week"), unit_types=dict(UNIT_TYPES))
    con = build_store(tmp, records, config)
    audit(con, config)
    written = write_outputs(con, config, RUN_ID, Log(quiet=True))
    ids = [r[0] for r in con.execute("select distinct patient_id from records").fetchall()]
    samples = [r[0] for r in con.execute("select sample_id from records").fetchall()]
    keys = [r[0] for r in con.execute("select distinct patient_key from records").fetchall()]
    yield {
        "con": con,
        "config": config,
        "out": config.output_folder,
        "written": written,
        "ids": ids,
        "samples": samples,
        "keys": keys,
        "tmp": tmp,
    }
    con.close()


def file_text(path: Path) -> str:
    """Everything readable in an output file: text files as they are, Parquet as CSV, xlsx as its XML parts."""
    if path.suffix == ".parquet":
        return pl.read_parquet(path).write_csv()
    if path.suffix == ".xlsx":
        with zipfile.ZipFile(path) as book:
            return "\n".join(book.read(name).decode("utf-8") for name in book.namelist())
    return path.read_text(encoding="utf-8")


def test_every_output_is_written_in_place(site):
    out: Path = site["out"]
    for table in PUBLISHED_TABLES:
        assert (out / TABLES_DIR / f"{table}.parquet").is_file()
        assert (out / TABLES_DIR / f"{table}.csv").is_file()
    for table in RESTRICTED_TABLES:
        for suffix in (".parquet", ".csv", ".xlsx"):
            assert (out / RESTRICTED_DIR / f"{table}{suffix}").is_file()
    assert (out / WORKBOOK_NAME).is_file() and (out / REPORT_NAME).is_file()
    assert sorted(site["written"]) == sorted(p for p in out.rglob("*") if p.is_file())
    assert not [p for p in out.rglob("*") if p.name.startswith(".")]  # no temporary file left behind


def test_restricted_outputs_are_owner_only(site):
    out: Path = site["out"]
    assert stat.S_IMODE((out / RESTRICTED_DIR).stat().st_mode) == 0o700
    for path in (out / RESTRICTED_DIR).iterdir():
        assert stat.S_IMODE(path.stat().st_mode) == 0o600, path.name
    assert stat.S_IMODE((out / REPORT_NAME).stat().st_mode) == 0o640


def test_csv_marks_suppressed_cells_apart_from_zero(site):
    text = pl.read_csv(site["out"] / TABLES_DIR / "audit_rates.csv", infer_schema=False)
    parquet = pl.read_parquet(site["out"] / TABLES_DIR / "audit_rates.parquet")
    hidden = text.filter(pl.col("numerator") == SUPPRESSED)
    assert hidden.height > 0
    # the same rows in Parquet hold NULL, and name the suppressed columns
    assert (
        parquet.filter(pl.col("suppressed_columns").str.contains("numerator"))["numerator"].null_count()
        == hidden.height
    )
    assert (text["rate"] == SUPPRESSED).sum() == hidden.height + (
        text.filter((pl.col("numerator") != SUPPRESSED) & (pl.col("denominator") == SUPPRESSED)).height
    )
    assert "0" in text["numerator"].to_list()  # a real zero stays 0


def test_csv_cells_cannot_start_a_formula(site):
    text = pl.read_csv(site["out"] / TABLES_DIR / "audit_volume.csv", infer_schema=False)
    units = set(text["unit"].to_list())
    assert "'" + INJECTED_UNIT in units and INJECTED_UNIT not in units
    frame = pl.DataFrame({"a": ["=1+1", "+SUM(A1)", "-2", "@cmd", "plain", None], "n": [1, 2, 3, 4, 5, 6]})
    assert csv_frame(frame)["a"].to_list() == ["'=1+1", "'+SUM(A1)", "'-2", "'@cmd", "plain", None]


def test_workbook_has_every_table_and_no_formula(site):
    with zipfile.ZipFile(site["out"] / WORKBOOK_NAME) as book:
        workbook = book.read("xl/workbook.xml").decode()
        sheets = [book.read(n).decode() for n in book.namelist() if n.startswith("xl/worksheets/sheet")]
        strings = book.read("xl/sharedStrings.xml").decode()
    for table in ("about", *PUBLISHED_TABLES):
        assert f'name="{table}"' in workbook
    assert "review_worklist" not in workbook  # row-level data stays in the restricted folder
    assert not any("<f>" in s for s in sheets)  # the injected unit name is text, never a formula
    assert f"<t>{INJECTED_UNIT}</t>" in strings
    assert f">{SUPPRESSED}<" in strings and "audit aid, not a diagnostic device" in strings


def test_worklist_is_ranked_and_pseudonymised(site):
    worklist = pl.read_parquet(site["out"] / RESTRICTED_DIR / "review_worklist.parquet")
    assert worklist.height > 0
    assert worklist["review_rank"].to_list() == list(range(1, worklist.height + 1))
    ranks = worklist["severity"].replace_strict({"high": 1, "medium": 2, "low": 3, "info": 4}).to_list()
    assert ranks == sorted(ranks)
    assert set(worklist["patient_key"].drop_nulls()) <= set(site["keys"])
    assert {"sample_id", "evidence", "unit", "collected_at", "rule_title"} <= set(worklist.columns)
    assert "patient_id" not in worklist.columns


def tokens(text: str) -> set[str]:
    return set(re.findall(r"[A-Za-z0-9_-]+", text))


def test_no_raw_patient_identifier_in_any_output(site):
    ids, samples, keys = set(site["ids"]), set(site["samples"]), set(site["keys"])
    assert all(re.fullmatch(r"[A-Za-z0-9_-]+", i) for i in ids | samples | keys)  # whole tokens, so sets work
    for path in site["out"].rglob("*"):
        if path.is_file():
            assert not tokens(file_text(path)) & ids, f"raw patient identifier in {path.name}"
    restricted = tokens(file_text(site["out"] / RESTRICTED_DIR / "review_worklist.csv"))
    assert restricted & keys and restricted & samples  # the laboratory's list names samples and pseudonyms
    for path in published_files(site["out"]):  # aggregate files carry neither
        found = tokens(file_text(path))
        assert not found & samples, f"accession number in {path.name}"
        assert not found & keys, f"patient pseudonym in {path.name}"


def test_report_is_self_contained(site):
    html = (site["out"] / REPORT_NAME).read_text(encoding="utf-8")
    assert not re.search(r"""(?:src|href)\s*=\s*["']?\s*(?:https?:)?//""", html, re.I)
    assert not re.search(r"url\(\s*['\"]?\s*(?:https?:)?//", html, re.I)
    assert not re.search(r"<script|<link|<iframe|<img|@import|@font-face", html, re.I)
    # per question: the open control charts, the per-unit control charts and the funnel plots
    assert html.count("<svg") >= 6
    assert html.count(CAUTION) == 2
    assert "Contract checks: not run" in html  # the store holds no contract result
    for section in (
        "summary",
        "question-oxygenation",
        "question-documentation",
        "data-quality",
        "rules",
        "contract",
        "reconciliation",
        "analyser-qc",
        "age-groups",
        "methods",
        "appendix",
    ):
        assert f'id="{section}"' in html
    assert "'" + INJECTED_UNIT not in html  # the HTML escapes it instead
    assert "=HYPERLINK(&#34;http://example.invalid&#34;,&#34;ward&#34;)" in html
    # svg element ids are unique across the page (each chart's clip paths are prefixed)
    ids = re.findall(r'\bid="([^"]+)"', html)
    assert len(ids) == len(set(ids))


def test_contract_results_are_rendered_when_present(site, monkeypatch):
    from markupsafe import Markup

    monkeypatch.setattr("pipeline.report.svg_markup", lambda chart, prefix: Markup("<svg></svg>"))
    con: duckdb.DuckDBPyConnection = site["con"]
    con.execute(
        "create table if not exists contract_results (run_id varchar, source_file varchar, check_id varchar, "
        "expectation_type varchar, column_name varchar, severity varchar, success boolean, element_count bigint, "
        "unexpected_count bigint, unexpected_percent double, observed varchar)"
    )
    con.execute(
        "insert into contract_results by name select ? as run_id, '/data/exports/ward/2026-03-01.csv' as source_file, "
        "'ph_range' as check_id, 'expect_column_values_to_be_between' as expectation_type, 'ph' as column_name, "
        "'critical' as severity, false as success, 120 as element_count, 3 as unexpected_count, "
        "2.5 as unexpected_percent, '3 of 120 values outside 6.5-8' as observed",
        [RUN_ID],
    )
    try:
        html = render_report(con, site["config"], RUN_ID)
        earlier = render_report(con, site["config"], "another-run")
    finally:
        con.execute("delete from contract_results")
    assert "Contract checks: not run" not in html
    contract = block(html, "contract")
    # in words, not the validation library's raw result: the column, what it should be, how many files and values
    assert "expect_column_values_to_be_between" not in contract
    assert "ph : values outside 6.5-8 — critical check; failed in 1 of 1 file(s), 3 of 120 values (2.5 %)" in contract
    assert "2026-03-01.csv: 3 of 120 values outside 6.5-8" in contract
    assert "2026-03-01.csv" in html and "/data/exports" not in html  # file name only, never its folder
    assert "no incoming batch was checked in this run (1 result(s) of earlier runs" in earlier


# --------------------------------------------------------------------------------------
# The caution, what the audit cannot know, and the age groups
# --------------------------------------------------------------------------------------

# The sentences the product brief asks the report and the README to carry (brief, "Safety", and the issue).
CAUTION_SENTENCES = (
    "an audit aid, not a diagnostic device",
    "thresholds follow local policy and licensed clinical judgement",
    "Data-quality flags are possibilities to investigate, not verdicts: do not withdraw a result on a flag alone",
)
CANNOT_KNOW = (
    "not about all patients on oxygen",  # who is counted: patients who had a blood gas
    "otherwise the target is inferred: 88-92 % when a hypercapnic-risk flag is documented or PaCO2 is above normal",
    "weighs more",  # per-sample rates: repeat sampling of the sickest
    "Units are compared with units of the same type",  # no case-mix adjustment
    "no substitute for the laboratory's real-time delta checks",
)


@pytest.fixture(scope="module")
def oxygen_site(tmp_path_factory) -> dict[str, Any]:
    """The audit tests' hand-counted age-group and oxygen-status store (derived rows set by hand), its outputs."""
    tmp = tmp_path_factory.mktemp("oxygen-report")
    con, config = oxygen_store(tmp)
    write_outputs(con, config, RUN_ID, Log(quiet=True))
    html = (config.output_folder / REPORT_NAME).read_text(encoding="utf-8")
    yield {"con": con, "config": config, "html": html}
    con.close()


def block(html: str, element_id: str) -> str:
    """The text of the element with this id (up to its closing tag), tags removed, whitespace collapsed."""
    start = html.index(f'id="{element_id}"')
    tag = html.rfind("<", 0, start)
    name = re.match(r"<(\w+)", html[tag:]).group(1)
    depth, position = 0, tag
    for match in re.finditer(rf"<(/?){name}\b[^>]*>", html[tag:]):
        depth += -1 if match.group(1) else 1
        if depth == 0:
            position = tag + match.end()
            break
    text = re.sub(r"<[^>]+>", " ", html[tag:position])
    return " ".join(unescape(text).split())


def test_caution_and_what_the_audit_cannot_know_at_the_top_and_foot(oxygen_site):
    html = oxygen_site["html"]
    top, bottom = block(html, "caution-top"), block(html, "caution-bottom")
    assert html.index('id="caution-top"') < html.index('id="summary"')  # before any figure
    for text in (top, bottom):
        for sentence in (*CAUTION_SENTENCES, *CANNOT_KNOW):
            assert sentence in text, sentence
        for title, limit in LIMITS:
            assert f"{title}. {limit}" in text
    assert CAUTION in top
    # the data-quality section repeats it where the flags are
    assert "do not withdraw a result on a flag alone" in block(html, "data-quality")
    # and every printed page carries it in its bottom margin (a page margin box; checked by hand in a Chromium
    # PDF print: the sentence is on each of the 21 pages)
    margin = re.search(r"@bottom-left \{ content: \"([^\"]+)\"", html)
    assert margin and "not a diagnostic device" in margin.group(1)
    assert "Do not withdraw a result on a flag alone" in margin.group(1)


def test_workbooks_carry_the_caution_and_what_the_audit_cannot_know(oxygen_site):
    out = oxygen_site["config"].output_folder
    for book in (out / WORKBOOK_NAME, out / RESTRICTED_DIR / "review_worklist.xlsx"):
        with zipfile.ZipFile(book) as archive:
            strings = unescape(archive.read("xl/sharedStrings.xml").decode())
        for sentence in (*CAUTION_SENTENCES, *CANNOT_KNOW):
            assert sentence in strings, (book.name, sentence)


def test_report_counts_children_and_neonates_apart(oxygen_site):
    html = oxygen_site["html"]
    ages = block(html, "age-groups")
    assert "outside the adult targets, the adult A-a formula and the saturation curve check" in ages
    # Ward O, 2026-01: 32 samples, 22 adults, 3 age unknown, 5 children, 2 neonates (hand count in test_audit.py)
    assert "Ward O 2026-01 32 22 3 5 2" in ages
    summary = block(html, "summary")
    assert "5 children: outside the adult rates" in summary and "2 neonates: outside the adult rates" in summary
    assert "Oxygenation rates count adults only" in summary
    methods = block(html, "methods")
    assert "Oxygen given but not documented" in methods and "Oxygen status unknown" in methods
    assert (
        "Denominator: included adult arterial samples with a PaO2 and a target range that applies and no "
        "supplemental oxygen documented" in methods
    )
    assert "below the lower end of the target range that applies and PaO2 < 60 mmHg" in methods
    rates = block(html, "rates")
    # the rate blocks state each measure's numerator and denominator in words
    assert "Oxygen given but not documented (per sample) PaO2 above what the alveolar PO2 of room air allows" in rates
    assert "Ward O 15.4 % (2/13)" in rates  # undocumented oxygen, G4 of OXYGEN_GROUPS, by hand: 2 of 13


def test_methods_name_the_site_targets_by_unit_type(oxygen_site, monkeypatch):
    # The inferred target is stated with the site's own unit-type settings (a site setting, pipeline/config.py).
    import dataclasses

    from markupsafe import Markup

    from pipeline.config import OxygenTarget

    monkeypatch.setattr("pipeline.report.svg_markup", lambda chart, prefix: Markup("<svg></svg>"))
    config = dataclasses.replace(
        oxygen_site["config"],
        unit_types={"Ward O": "critical_care", "Ward K": "paediatric"},
        oxygen_targets={"critical_care": OxygenTarget(92.0, 96.0)},
    )
    methods = block(render_report(oxygen_site["con"], config, RUN_ID), "methods")
    assert "This site's unit types: critical_care 92-96 %; paediatric no target (not assessed)." in methods
    assert "This site sets no target by unit type." in block(oxygen_site["html"], "methods")


def test_answers_come_first_with_level_counts_and_wilson_interval(oxygen_site):
    html = oxygen_site["html"]
    # the questions are answered before the appendix, and the appendix is collapsed
    assert (
        html.index('id="question-oxygenation"')
        < html.index('id="question-documentation"')
        < html.index('id="appendix"')
    )
    assert re.search(r'<details class="appendix" id="rates">', html)
    documentation = block(html, "question-documentation")
    # every column says what one count is; every measure's denominator is stated in words below the table
    assert "Oxygen given but not documented per sample" in documentation
    assert "Oxygen given but not documented (per sample): PaO2 above what the alveolar PO2 of room air allows" in (
        documentation
    )
    # Ward O: 2 of 13 samples with undocumented oxygen (hand-counted, G4 of OXYGEN_GROUPS), rounded to 15 %, with
    # the Wilson 95 % interval of statsmodels (independent oracle) rounded the same way
    low, high = proportion_confint(2, 13, alpha=0.05, method="wilson")
    assert f"15 % 2/13 95 % CI {low * 100:.1f} %–{high * 100:.0f} %" in documentation
    oxygenation = block(html, "question-oxygenation")
    assert "Hypoxaemia per sample" in oxygenation and "All units" in oxygenation
    assert "Over time" in oxygenation and "Units compared" in oxygenation


def test_suppressed_cells_say_so_with_a_reason(site):
    html = (site["out"] / REPORT_NAME).read_text(encoding="utf-8")
    answers = " ".join(block(html, f"question-{q}") for q in ("oxygenation", "documentation"))
    k = site["config"].small_cell_threshold
    assert f"{SUPPRESSED} under {k} or would reveal one" in answers
    assert f'title="a count of 1 to {k - 1} samples, or a value that would reveal one"' in html


def readme_caution() -> str:
    """The README's caution block: the quoted lines near the top."""
    lines = (ROOT / "README.md").read_text(encoding="utf-8").splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("> **Caution."))
    quoted = []
    for line in lines[start:]:
        if not line.startswith(">"):
            break
        quoted.append(line.lstrip("> ").strip())
    return " ".join(" ".join(quoted).replace("**", "").split())


def test_readme_caution_block_says_what_the_audit_cannot_know():
    text = readme_caution()
    for sentence in (*CAUTION_SENTENCES, *CANNOT_KNOW):
        assert sentence in text, sentence


# --------------------------------------------------------------------------------------
# Headless Chromium: loads with no network request, shows charts and the caution
# --------------------------------------------------------------------------------------


def chromium(page: Path, tmp: Path, *extra: str) -> tuple[str, list[str]]:
    """Open ``page`` headless with every host unresolvable; return the DOM and the URLs the page asked for.

    The network log holds every request the browser started; those made for the page carry the page's site
    (file://) in their network isolation key, which tells them apart from the browser's own background
    traffic (update and time checks), failing here too.
    """
    if not Path(CHROMIUM).exists():
        pytest.fail("chromium is not installed (Debian: apt-get install chromium; scripts/install-test-deps does it)")
    netlog = tmp / f"{page.stem}-net.json"
    command = [
        CHROMIUM,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--no-default-browser-check",
        f"--user-data-dir={tmp / 'chromium-profile'}",
        "--host-resolver-rules=MAP * ~NOTFOUND",
        f"--log-net-log={netlog}",
        "--net-log-capture-mode=Everything",
        *extra,
        page.as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=60, check=True)
    log = json.loads(netlog.read_text(encoding="utf-8"))
    start = log["constants"]["logEventTypes"]["URL_REQUEST_START_JOB"]
    urls = [
        e["params"]["url"]
        for e in log["events"]
        if e["type"] == start and "file://" in str(e.get("params", {}).get("network_isolation_key", ""))
    ]
    assert log["events"], "the network log is empty: logging did not work"
    return done.stdout, urls


def network_urls(urls: list[str]) -> list[str]:
    return [u for u in urls if not u.startswith(("file:", "data:", "about:", "chrome:", "blob:"))]


def test_chromium_detects_a_network_request(tmp_path):
    # Control: a page that does fetch something shows up in the network log, so the check below can fail.
    page = tmp_path / "fetching.html"
    page.write_text('<html><body><img src="http://example.invalid/x.png"></body></html>', encoding="utf-8")
    _, urls = chromium(page, tmp_path, "--dump-dom")
    assert any("example.invalid" in u for u in network_urls(urls))


def test_report_renders_offline_in_chromium(site, tmp_path):
    report = site["out"] / REPORT_NAME
    dom, urls = chromium(report, tmp_path, "--dump-dom", "--virtual-time-budget=3000")
    assert network_urls(urls) == []
    assert dom.count("<svg") >= 8  # at least the open control charts and the funnel plots of four questions
    assert CAUTION_WORDS in dom
    assert "Blood gas record audit" in dom
    assert not tokens(dom) & set(site["ids"])
    shot = tmp_path / "first-screen.png"
    _, urls = chromium(report, tmp_path, f"--screenshot={shot}", "--window-size=1280,900")
    assert network_urls(urls) == []
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 20_000


MEASURE_SCRIPT = """<script>
document.addEventListener('DOMContentLoaded', () => {
  const page = document.documentElement;
  document.body.setAttribute('data-size', page.scrollWidth + 'x' + page.scrollHeight + 'x' + page.clientWidth);
});
</script>"""


def rendered_size(report: Path, tmp: Path, width: int = 1400) -> tuple[int, int, int]:
    """(scroll width, scroll height, viewport width) of the report laid out by Chromium at ``width`` px: a copy
    with a measuring script (the report itself has none) is opened headless."""
    copy = tmp / "measured.html"
    copy.write_text(report.read_text(encoding="utf-8").replace("</head>", MEASURE_SCRIPT + "</head>", 1))
    dom, urls = chromium(copy, tmp, "--dump-dom", "--hide-scrollbars", f"--window-size={width},1000")
    assert network_urls(urls) == []
    found = re.search(r'data-size="(\d+)x(\d+)x(\d+)"', dom)
    assert found, "the measuring script did not run"
    scroll_width, height, viewport = (int(v) for v in found.groups())
    return scroll_width, height, viewport


def test_report_fits_the_screen_and_stays_short(site, tmp_path):
    # Nine invented weeks of a demo-like hospital (its units and unit types): at 1400 px wide the whole page,
    # appendix collapsed, is at most 12 000 px tall and nothing runs off to the side.
    width, height, viewport = rendered_size(site["out"] / REPORT_NAME, tmp_path)
    assert viewport == 1400
    assert width <= viewport, f"horizontal overflow: {width} px"
    assert 2_000 < height <= 12_000, f"report is {height} px tall"
    shot = tmp_path / "whole.png"
    chromium(
        site["out"] / REPORT_NAME, tmp_path, f"--screenshot={shot}", "--hide-scrollbars", f"--window-size=1400,{height}"
    )
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_weekly_axis_ticks_are_iso_week_mondays(site):
    # Ticks sit on each period's first day and are labelled with its ISO week: a tick on any other day would
    # carry another week's label or none. The labels are the periods of audit_rates (Monday-first ISO weeks,
    # 13_audit_period.sql; the ISO 8601 week date, checked here with Python's own isocalendar).
    html = (site["out"] / REPORT_NAME).read_text(encoding="utf-8")
    rates = pl.read_parquet(site["out"] / TABLES_DIR / "audit_rates.parquet").filter(~pl.col("all_periods"))
    starts = sorted({d.date() if isinstance(d, datetime) else d for d in rates["period_start"].to_list()})
    assert all(d.weekday() == 0 for d in starts)  # Mondays
    labels = {f"{d.isocalendar().year}-W{d.isocalendar().week:02d}" for d in starts}
    drawn = set(re.findall(r">(\d{4}-W\d{2})</text>", html))
    assert drawn <= labels and min(labels) in drawn


def test_every_output_states_its_audience(site, tmp_path):
    con: duckdb.DuckDBPyConnection = site["con"]
    audience = Audience("internal", 5, tmp_path / "internal", "INTERNAL - for the invented site's own meetings only.")
    written = write_outputs(con, site["config"], RUN_ID, Log(quiet=True), audience=audience)
    assert written and all(audience.folder in p.parents for p in written)
    html = (audience.folder / REPORT_NAME).read_text(encoding="utf-8")
    assert audience.label in block(html, "page-header") + block(html, "audience-top")
    assert audience.label in block(html, "page-footer")
    assert "under 5 or would reveal one" in html or "suppressed" not in block(html, "question-oxygenation")
    for path in written:
        if path.suffix == ".parquet":
            meta = pl.read_parquet_metadata(path)
            assert meta["audience"] == audience.label and CAUTION == meta["caution"], path.name
            assert "not about all patients on oxygen" in meta["who_is_counted"]
        elif path.suffix == ".csv":
            sidecar = json.loads(path.with_name(path.name + "-metadata.json").read_text(encoding="utf-8"))
            assert sidecar["url"] == path.name and sidecar["dc:audience"] == audience.label
            assert "not a diagnostic device" in sidecar["dc:description"]
        elif path.suffix == ".xlsx":
            with zipfile.ZipFile(path) as book:
                strings = unescape(book.read("xl/sharedStrings.xml").decode())
            assert audience.label in strings and "not about all patients on oxygen" in strings
    # the publication outputs of the fixture say theirs
    published = (site["out"] / REPORT_NAME).read_text(encoding="utf-8")
    assert "For publication: no count from 1 to 10 is shown or can be derived." in block(published, "audience-top")


# About a week's and most of a month's blood gases of a mid-sized hospital (tens of thousands a year).
@pytest.mark.parametrize(("period", "days", "rows"), [("week", 5, 1000), ("month", 20, 1500)])
def test_a_short_first_extract_gives_a_useful_report(tmp_path, period, days, rows):
    # A site's first delivery covers part of one week or one month: the period is shown, labelled partial,
    # and the hospital-wide answers carry figures, not only suppressed cells.
    records, _ = generate(rows=rows, seed=13, days=days)
    config = dataclasses.replace(audit_config(tmp_path, k=11, period=period), unit_types=dict(UNIT_TYPES))
    con = build_store(tmp_path, records, config)
    audit(con, config)
    write_outputs(con, config, RUN_ID, Log(quiet=True))
    con.close()
    html = (config.output_folder / REPORT_NAME).read_text(encoding="utf-8")
    assert "still under way (partial)" in block(html, "page-header")
    for question in ("oxygenation", "documentation"):
        text = block(html, f"answers-{question}")
        site_row = text[text.rindex("All units") :]
        shown = re.findall(r"\d+(?:\.\d)? % \d+/\d+ 95 % CI", site_row)
        # rare events (a device mismatch, undocumented oxygen) may still be under the threshold hospital-wide
        assert len(shown) >= 1, (question, site_row[:300])
    answers = re.findall(r'<td class="num">(.*?)</td>', html)
    suppressed = [a for a in answers if SUPPRESSED in a]
    assert len(suppressed) < len(answers) * 0.8


# --------------------------------------------------------------------------------------
# The report command and the nightly run
# --------------------------------------------------------------------------------------

SITE_TOML = """\
[site]
name = "Invented report test site"
barometric_pressure_mmhg = 760

[store]
path = "store/abg_audit.duckdb"

[output]
folder = "output"

[privacy]
small_cell_threshold = 11

[audit]
period = "month"
complete_periods_only = false

[[inputs]]
path = "exports"
profile = "{profile}"
pattern = "*.csv"
"""
PROFILE = Path(__file__).parent / "fixtures" / "profiles" / "minimal.toml"
HEADER = "id,mrn,ward,collected,resulted,type,device,fio2,ph,pco2,po2,hco3\n"


def export_rows(count: int) -> str:
    rows = []
    for n in range(count):
        day, minute = 2 + n // 40, n % 40
        po2 = 55 if n % 6 == 0 else 88
        rows.append(
            f"S{n:05d},MRN-{n % 37:03d}-X,W{n % 2 + 1},2026-03-{day:02d} 10:{minute:02d},"
            f"2026-03-{day:02d} 10:{minute + 8:02d},A,RA,0.21,7.40,40,{po2},24.5\n"
        )
    return HEADER + "".join(rows)


def test_nightly_run_writes_the_outputs_and_report_command_rebuilds_them(tmp_path, monkeypatch):
    from pipeline.cli import main

    monkeypatch.setenv("ABG_AUDIT_PSEUDONYM_KEY", "report-test-key-0123456789abcdef")
    (tmp_path / "exports").mkdir()
    (tmp_path / "exports" / "2026-03.csv").write_text(export_rows(120), encoding="utf-8")
    config = tmp_path / "site.toml"
    config.write_text(SITE_TOML.format(profile=PROFILE.as_posix()), encoding="utf-8")
    runner = CliRunner()
    result = runner.invoke(main, ["run", "--config", str(config)])
    assert result.exit_code == 0, result.output
    report = tmp_path / "output" / REPORT_NAME
    assert report.is_file()
    first = report.stat().st_mtime_ns
    html = report.read_text(encoding="utf-8")
    assert "2026-03" in html and "MRN-" not in html
    volume = pl.read_parquet(tmp_path / "output" / TABLES_DIR / "audit_volume.parquet")
    assert volume.filter(pl.col("all_units") & pl.col("all_periods"))["samples"].to_list() == [120]

    result = runner.invoke(main, ["report", "--config", str(config), "--period", "week"])
    assert result.exit_code == 0, result.output
    assert "files written" in result.output and "not a diagnostic device" in result.output
    assert report.stat().st_mtime_ns > first
    weeks = pl.read_parquet(tmp_path / "output" / TABLES_DIR / "audit_volume.parquet")
    assert any(p.startswith("2026-W") for p in weeks["period"].to_list())


def test_report_command_on_a_missing_store_is_a_clear_error(tmp_path):
    from pipeline.cli import main

    config = tmp_path / "site.toml"
    config.write_text(SITE_TOML.format(profile=PROFILE.as_posix()), encoding="utf-8")
    result = CliRunner().invoke(main, ["report", "--config", str(config)])
    assert result.exit_code == 74
    assert "no store" in result.output and "Traceback" not in result.output


def test_first_night_without_a_complete_period(tmp_path):
    # One sample in a month still under way, and the site leaves such a period out: the tables hold only a zero
    # total and the report says so.
    from tests.rule_harness import record

    config = audit_config(tmp_path, k=11, complete_periods_only=True)
    con = build_store(tmp_path, [record("ONLY")], config)
    audit(con, config)
    write_outputs(con, config, RUN_ID, Log(quiet=True))
    con.close()
    html = (config.output_folder / REPORT_NAME).read_text(encoding="utf-8")
    assert "No complete period with data yet." in html and "no complete period yet" in html
    volume = pl.read_parquet(config.output_folder / TABLES_DIR / "audit_volume.parquet")
    assert volume.select("samples", "samples_usable").rows() == [(0, 0)]


def test_a_unit_type_not_drawn_for_one_measure_is_named_with_that_measure_only():
    # A fresh-user reading found "Not drawn: critical care" above a funnel that did draw the
    # critical-care units (two of them had data for that measure, one for another).
    from pipeline.report import funnel_charts

    def unit(measure: str, unit_type: str, name: str) -> dict[str, Any]:
        return {"measure": measure, "unit_type": unit_type, "unit": name, "rate": None, "denominator": 40,
                "position": None}

    question = {"measures": [{"measure": "hypox", "title": "Hypoxaemia", "level": "sample"},
                             {"measure": "hyperox", "title": "Hyperoxaemia on oxygen", "level": "sample"},
                             {"measure": "fio2", "title": "FiO2 documented", "level": "sample"}]}
    funnel = pl.DataFrame([
        unit("hypox", "critical_care", "Unit A"),
        unit("hypox", "critical_care", "Unit B"),
        unit("hyperox", "critical_care", "Unit A"),
        unit("hypox", "emergency", "Unit E"),
        unit("hyperox", "emergency", "Unit E"),
        unit("fio2", "critical_care", "Unit B"),
        unit("fio2", "emergency", "Unit E"),
    ], schema_overrides={"rate": pl.Float64, "position": pl.String})
    curve = pl.DataFrame(schema={"measure": pl.String, "unit_type": pl.String, "volume": pl.Int64})

    drawn = funnel_charts(question, funnel, curve, "t")

    # titles keep the capitals of an abbreviation inside the sentence
    assert drawn["alone"] == ["critical care units for hyperoxaemia on oxygen, FiO2 documented", "emergency units"]
    assert drawn["svg"] is not None  # the two critical-care units of the first measure are drawn


def test_the_rule_catalogue_says_what_from_memory_means_where_references_use_it(oxygen_site):
    # A fresh-user reading met "from memory" beside rule sources with no word on what it means.
    rules = block(oxygen_site["html"], "rules")
    assert "from memory" in rules.split("Rule Title")[1]  # some reference in the catalogue uses it
    assert "“from memory” marks a value or citation given as recalled and not yet confirmed" in rules
