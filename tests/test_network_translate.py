"""The network run without Spark: the macro expansion, the exact rounding the Spark translation
uses, the list of statements that do not translate, and that the network run on DuckDB gives a
site exactly what its own nightly stages give it."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import duckdb
import polars as pl
import pytest
import sqlglot

from pipeline.audit import PUBLISHED_TABLES, build_audit
from pipeline.config import SiteConfig
from pipeline.derive import derive
from pipeline.errors import ConfigError
from pipeline.network import translate
from pipeline.network.compare import differences, published_differences
from pipeline.network.demo_lake import demo_key, demo_unit_targets, store_demo_site
from pipeline.network.engines import DuckDBEngine, read_lake
from pipeline.network.lake import SiteSettings, publish_lake, read_manifests
from pipeline.network.macros import expand_macros, load_macros
from pipeline.network.run import load_settings, run_network
from pipeline.network.stages import STAGE_OUTPUTS, stage_statements
from pipeline.pseudonym import pseudonym
from pipeline.rules import catalogue_frame, evaluate_rules, load_catalogue
from pipeline.sql_files import SQL_DIR, install_macros, run_sql
from pipeline.store import open_scratch_store
from synthetic_data import generate_demo
from synthetic_data.hospital import UNIT_TYPES

SITE = "invented-one-site"


def expanded(sql: str) -> str:
    return expand_macros(translate.parse(sql)).sql(dialect="duckdb")


def test_every_macro_file_statement_is_read() -> None:
    # each CREATE MACRO of sql/macros/ becomes one Macro (none skipped)
    text = "\n".join(p.read_text(encoding="utf-8") for p in sorted((SQL_DIR / "macros").glob("*.sql")))
    assert len(load_macros()) == text.upper().count("CREATE OR REPLACE TEMP MACRO")


def test_defaults_named_arguments_and_nesting() -> None:
    # Dalton's law, PiO2 = FiO2 x (PB - PH2O), with the macro's default PH2O of 47 mmHg: 0.5 x 653
    con = duckdb.connect()  # no macros installed: the expanded SQL must stand alone
    assert con.sql(expanded("select inspired_po2_mmhg(0.5, 700)")).fetchall()[0][0] == pytest.approx(326.5)
    assert con.sql(expanded("select inspired_po2_mmhg(0.5, 700, ph2o_mmhg := 0)")).fetchall()[0][0] == 350.0
    # alveolar gas equation (max form, R = 1): 0.21 x (760 - 47) - 40 = 109.73 mmHg; calls inspired_po2_mmhg
    value = con.sql(expanded("select alveolar_po2_max_mmhg(0.21, 40, pb_mmhg := 760)")).fetchall()[0][0]
    assert value == pytest.approx(109.73)
    with pytest.raises(ValueError, match="no parameter"):
        expanded("select pf_ratio(80, fio2 := 0.5, typo := 1)")


def test_expanded_macros_equal_the_installed_ones_at_every_call_site(tmp_path: Path) -> None:
    # oracle: DuckDB's own macros. Every stage statement run with its macros inlined (a connection
    # without macros) gives the same tables as the same statement with the macros installed.
    lake = tmp_path / "lake"
    build_site_lake(lake, rows=700)
    catalogue = load_catalogue()
    inputs = read_lake(lake, read_manifests(lake))
    native, inlined = DuckDBEngine(), DuckDBEngine()
    inlined.con.close()
    inlined.con = duckdb.connect()
    inlined.con.execute("set TimeZone = 'UTC'")
    for engine in (native, inlined):
        engine.load(inputs, catalogue_frame(catalogue))
    macros = load_macros()
    for statement in stage_statements(catalogue, "run"):
        native.run(statement)
        text = statement.text(inlined.columns)
        tree = translate.network_rewrite(translate.parse(text))
        calls = {c.name.lower() for c in tree.find_all(sqlglot.exp.Anonymous)} & macros.keys()
        # statements without a macro run as written (sqlglot's DuckDB output drops "with no data")
        sql = expand_macros(tree, macros).sql(dialect="duckdb") if calls else translate.to_duckdb(text)
        assert not any(f"{name}(" in sql.lower() for name in macros), statement.source
        used = inlined.con.extract_statements(sql)[0].named_parameters
        inlined.con.execute(sql, {k: v for k, v in statement.params.items() if k in used})
    for table in STAGE_OUTPUTS:
        assert differences(table, native.output(table), inlined.output(table)) == [], table


def test_exact_rounding_equals_duckdb() -> None:
    # oracle: DuckDB's round() (ties away from zero on the exact binary value) and printf's %.nf
    # (C printf: ties to even on the exact binary value), on values full of decimal ties
    con = duckdb.connect()
    con.execute(
        "create table v as "
        "select round(random() * 2000 - 1000, 3) + 0.0005 * (i % 3 - 1) as x from range(60000) t(i) "
        "union all select round(random() * 1000, 2) + 0.005 from range(30000) "
        "union all select i / 8.0 from range(-2000, 2000) t(i) "
        # (values beyond 2^52 / 10^n are outside the emulation's domain, and far outside any blood gas value)
        "union all select * from (values (32.55), (2.675), (0.125), (-2.5), (123456.785)) t(x)"
    )
    con.execute("select setseed(0.42)")
    x = sqlglot.exp.column("x")
    for digits in (0, 1, 2):
        away = translate.exact_round(x, digits, ties="away").sql(dialect="duckdb")
        even = translate.exact_round(x, digits, ties="even").sql(dialect="duckdb")
        wrong = con.execute(
            f"select count(*) filter (where round(x, {digits}) is distinct from {away}), "
            f"count(*) filter (where printf('%.{digits}f', x) <> printf('%.{digits}f', {even})) from v"
        ).fetchall()[0]
        assert wrong == (0, 0), digits
    # the naive way (scale, round, unscale) is not the same: the check above can fail
    naive = con.execute("select count(*) filter (where round(x, 2) <> round(x * 100.0) / 100.0) from v").fetchall()
    assert naive[0][0] > 0


def test_untranslated_statements_are_exactly_the_listed_ones() -> None:
    # every stage statement either translates for Spark SQL (and the output parses as Spark SQL)
    # or is in translate.UNTRANSLATABLE with its reason; nothing is skipped silently
    failed = set()
    catalogue = load_catalogue()
    columns = {"records": ["sample_id", "unit"], "derived": ["sample_id", "pf_ratio"]}
    for statement in stage_statements(catalogue, "run"):
        try:
            spark_sql = translate.to_spark(statement.text(columns.__getitem__), statement.params)
        except translate.Untranslatable:
            failed.add(statement.source.split("#")[0])
            continue
        parsed = sqlglot.parse_one(spark_sql, read="spark")
        assert not list(parsed.find_all(sqlglot.exp.Placeholder)), statement.source  # every parameter bound
    assert failed == set(translate.UNTRANSLATABLE)


def test_printf_translation_keeps_duckdb_semantics() -> None:
    spark = translate.to_spark("select printf('PaO2 %.0f mmHg, ' || 'site %s', pao2, name) from t", {})
    assert "FORMAT_STRING('PaO2 %.0f mmHg, site %s'" in spark  # one literal format
    assert "IS NULL" in spark  # NULL argument, NULL text (Spark would print "null")


def build_site_lake(lake: Path, rows: int = 900, seed: int = 31) -> tuple[duckdb.DuckDBPyConnection, bytes]:
    """One invented site: a scratch store with its records, published to ``lake``."""
    key = demo_key(SITE)
    con = open_scratch_store(lake.parent / "spill")
    store_demo_site(con, generate_demo(rows, seed), key, SITE)
    publish_lake(con, SiteSettings(SITE, "Invented one site", None, 120.0, demo_unit_targets()), key, lake)
    return con, key


@pytest.fixture(scope="module")
def site_and_network(
    tmp_path_factory: pytest.TempPathFactory,
) -> Iterator[tuple[duckdb.DuckDBPyConnection, bytes, Path]]:
    """One site's own nightly stages and audit on its store, and the network run on DuckDB over the
    lake the site published from that store."""
    root = tmp_path_factory.mktemp("one-site")
    lake = root / "lake"
    con, key = build_site_lake(lake)
    config = SiteConfig(
        None,
        "Invented one site",
        Path("."),
        root / "site-output",
        None,
        (),
        altitude_m=120.0,
        unit_types=dict(UNIT_TYPES),
    )
    catalogue = load_catalogue()
    run_sql(con, "derive/00_scope.sql", rebuild=True, run_id="site-run")
    derive(con, catalogue, config)
    evaluate_rules(con, catalogue, "site-run")
    build_audit(con, config, catalogue, "site-run")  # rebuilds the aggregate layer, then the tables
    run_network(lake, root / "out", engine="duckdb")
    yield con, key, root / "out"
    con.close()


def test_network_run_gives_the_site_what_its_own_stages_give(
    site_and_network: tuple[duckdb.DuckDBPyConnection, bytes, Path],
) -> None:
    # "identical to what each site sees": the site's nightly stages (pipeline.derive, pipeline.rules,
    # pipeline.audit's layer) on its store against the network run on DuckDB over the published lake
    con, key, out = site_and_network
    for table in STAGE_OUTPUTS:
        network = pl.read_parquet(out / table / "**" / "*.parquet", hive_partitioning=True)
        network = network.with_columns(pl.col("site").cast(pl.String))
        site = con.sql(f"select * from {table}").pl()
        site = as_published(site, key).with_columns(pl.lit(SITE).alias("site")).select(network.columns)
        assert site.height > 0, table
        assert differences(table, site, network) == [], table


# The file reconciliation is about the site's exports, which the lake does not hold (empty there).
SITE_ONLY = {"audit_run_reconciliation"}


@pytest.mark.parametrize("table", [t for t in PUBLISHED_TABLES if t not in SITE_ONLY])
def test_network_publishes_what_the_site_publishes(
    site_and_network: tuple[duckdb.DuckDBPyConnection, bytes, Path], table: str
) -> None:
    # oracle: the site's own audit stage (pipeline.audit.build_audit on its store, the layer built
    # there from its records); the network builds the same tables from the layer its engine made
    con, _, out = site_and_network
    site = con.sql(f"select * from {table}").pl()
    published = pl.read_parquet(out / "published" / "sites" / SITE / "tables" / f"{table}.parquet")
    assert published_differences(table, site, published) == []
    combined = pl.read_parquet(out / "published" / "tables" / f"{table}.parquet")
    assert combined.columns[0] == "site" and set(combined["site"]) <= {SITE}
    assert published_differences(table, site, combined.drop("site")) == []
    if table in ("audit_rates", "audit_volume", "audit_control_chart", "audit_funnel"):
        assert site.height > 0


def test_network_outputs_carry_the_caution_and_no_reconciliation_rows(
    site_and_network: tuple[duckdb.DuckDBPyConnection, bytes, Path],
) -> None:
    _, _, out = site_and_network
    published = out / "published"
    network_report = (published / "network_report.html").read_text(encoding="utf-8")
    site_report = (published / "sites" / SITE / "audit_report.html").read_text(encoding="utf-8")
    for html in (network_report, site_report):
        assert html.count("an audit aid, not a diagnostic device") >= 2  # top and foot
        assert "thresholds follow local policy and licensed clinical judgement" in html
    assert f'href="sites/{SITE}/audit_report.html"' in network_report
    assert 'id="answers-oxygenation"' in network_report and 'id="flag-rates"' in network_report
    assert pl.read_parquet(published / "sites" / SITE / "tables" / "audit_run_reconciliation.parquet").height == 0
    # the worklist is row level: restricted, never beside the published tables
    assert (published / "sites" / SITE / "restricted" / "review_worklist.parquet").exists()
    assert not list(published.glob("**/tables/review_worklist*"))


def test_network_settings_file(tmp_path: Path) -> None:
    path = tmp_path / "network.toml"
    path.write_text(
        "[thresholds.decimal_slip]\n[audit]\nperiod = 'week'\n[privacy]\nsmall_cell_threshold = 6\n",
        encoding="utf-8",
    )
    settings = load_settings(path)
    assert (settings.audit.period, settings.small_cell_threshold) == ("week", 6)
    path.write_text("[privacy]\nkey_file = 'k'\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="small_cell_threshold"):
        load_settings(path)
    path.write_text("[site]\nname = 'x'\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="unknown sections"):
        load_settings(path)


def as_published(frame: pl.DataFrame, key: bytes) -> pl.DataFrame:
    """The site's own table with its record numbers as the lake publishes them."""

    def lake_id(column: str, domain: str) -> pl.Expr:
        return pl.col(column).map_elements(lambda v: pseudonym(key, v, domain), return_dtype=pl.String)

    if "sample_id" in frame.columns:
        frame = frame.with_columns(lake_id("sample_id", "lake sample"))
    if "prescription_id" in frame.columns:
        frame = frame.with_columns(lake_id("prescription_id", "lake prescription"))
    if "episode_key" in frame.columns:
        frame = frame.with_columns(
            pl.when(pl.col("episode_key").str.starts_with("sample:"))
            .then(
                pl.lit("sample:")
                + pl.col("episode_key")
                .str.slice(7)
                .map_elements(lambda v: pseudonym(key, v, "lake sample"), return_dtype=pl.String)
            )
            .otherwise(pl.col("episode_key"))
            .alias("episode_key")
        )
    return frame


def test_install_macros_is_what_the_network_duckdb_engine_uses() -> None:
    # the DuckDB engine installs the same macros as a site store (one home for each formula)
    engine = DuckDBEngine()
    reference = duckdb.connect()
    install_macros(reference)
    query = "select function_name from duckdb_functions() where function_type = 'macro' and not internal order by 1"
    assert engine.con.sql(query).fetchall() == reference.sql(query).fetchall()


def test_network_duckdb_engine_spills_into_the_run_work_folder(tmp_path: Path) -> None:
    # An in-memory DuckDB spills to ./.tmp unless told otherwise (observed with DuckDB 2.0.1:
    # current_setting('temp_directory') of a fresh in-memory connection); the network run's rows
    # are pseudonymised but still belong in its own owner-only work folder, which the run removes.
    from pipeline.network.run import make_engine

    engine = make_engine("duckdb", master="local[*]", work=tmp_path)
    try:
        setting = engine.con.execute("select current_setting('temp_directory')").fetchone()[0]
    finally:
        engine.close()
    assert Path(setting) == tmp_path / "duckdb-spill"
    assert (tmp_path / "duckdb-spill").stat().st_mode & 0o777 == 0o700  # owner-only, as the store's spill folder
