"""Run the stage statements on a lake: DuckDB (the reference) or Spark SQL.

Both engines get the same network inputs (``network_input_sql``): the lake's records with every
identifier qualified by its site (``<site>/<id>``), so that a window "per patient" or "per analyser"
of the stage SQL is a window per site and patient or analyser, a join on a unit name joins within
its site, and two sites' sample numbers never meet; every record is in scope. DuckDB executes the
stage statements as the site does (macros installed, parameters bound). Spark has no tables to
delete from or insert into without a table format, so each statement becomes a temporary view:
``create ... as select`` defines the view, ``insert`` appends to it (union by name), ``delete``
keeps the rows the condition does not match, ``create table if not exists`` makes an empty view
when there is none. Each new view is checkpointed so later statements do not recompute it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import sqlglot
from sqlglot import exp

from pipeline.network import translate
from pipeline.network.stages import Statement

# Identifier columns qualified by the site in the network inputs (and unqualified in the outputs).
QUALIFIED_COLUMNS = (
    "sample_id",
    "patient_key",
    "encounter_key",
    "operator_key",
    "analyser_id",
    "unit",
    "prescription_id",
)
SEPARATOR = "/"


@dataclass
class LakeInputs:
    """What the network run reads: per table, the Parquet files per site; the sites' settings."""

    files: dict[str, dict[str, list[str]]]  # table -> site -> absolute paths
    sites: list[tuple[str, float | None, float | None]]  # site, pressure (mmHg), altitude (m)
    unit_targets: list[tuple[str, str, str, float | None, float | None, bool]]  # site, unit, type, low, high, assessed


@dataclass
class EngineRun:
    engine: str
    untranslated: list[str] = field(default_factory=list)  # statement sources not run (Spark only)
    seconds: dict[str, float] = field(default_factory=dict)


def qualified(column: str, alias: str = "r") -> str:
    if column in QUALIFIED_COLUMNS:
        return f"{alias}.site || '{SEPARATOR}' || {alias}.{column} as {column}"
    return f"{alias}.{column}"


def network_input_sql(table: str, columns: list[str]) -> str:
    """Portable SQL (DuckDB and Spark): the lake table ``<table>_lake`` with qualified identifiers;
    records gain their site's pressure settings (stages.SITE_COLUMN_PARAMETERS)."""
    select = ", ".join(qualified(c) for c in columns)
    if table == "records":
        return (
            f"select {select}, s.site_pb_mmhg, s.site_altitude_m from records_lake as r "
            "join network_sites as s on s.site = r.site"
        )
    return f"select {select} from {table}_lake as r"


UNIT_TARGETS_SQL = (
    f"select site || '{SEPARATOR}' || unit as unit, unit_type, target_low_pct, target_high_pct, assessed "
    "from network_unit_targets"
)
SCOPE_SQL = {
    "scope_samples": "select sample_id from records",
    "scope_runs": "select run_id from records where false",
    "scope_settings": "select true as rebuild",
    # the site's run ledger, which the audit layer reads for its own bookkeeping: none in a lake
    "runs": "select run_id, cast(null as timestamp) as analysed_at from records where false",
}


def output_sql(table: str, columns: list[str]) -> str:
    """An output relation with its site and its identifiers as the site knows them."""
    site = f"substring(sample_id, 1, instr(sample_id, '{SEPARATOR}') - 1)"
    key = "analyser_id" if table == "analyser_qc" else "unit" if table.startswith("audit_unit_period") else "sample_id"
    site = site.replace("sample_id", key)
    parts = [f"{site} as site"]
    for column in columns:
        if column in QUALIFIED_COLUMNS:
            parts.append(f"substring({column}, length({site}) + 2) as {column}")
        elif column == "episode_key":
            parts.append(f"replace(episode_key, {site} || '{SEPARATOR}', '') as episode_key")
        else:
            parts.append(column)
    return f"select {', '.join(parts)} from {table}"


class DuckDBEngine:
    name = "duckdb"

    def __init__(self, memory_limit: str = "2GB", threads: int | None = None, spill: Path | None = None) -> None:
        from pipeline.sql_files import install_macros
        from pipeline.store import session_settings

        self.con = duckdb.connect()
        # An in-memory database spills to ./.tmp by default; the run's own work folder keeps
        # pseudonymised rows out of the operator's working directory.
        session_settings(self.con, memory_limit, spill)
        if threads:
            self.con.execute(f"set threads = {int(threads)}")
        install_macros(self.con)

    def load(self, inputs: LakeInputs, catalogue_frame: pl.DataFrame) -> None:
        for table, per_site in inputs.files.items():
            read = "read_parquet({}, union_by_name = true, hive_partitioning = false)"
            parts = [
                f"select *, '{site}' as site from {read.format(sorted(paths))}"
                for site, paths in sorted(per_site.items())
            ]
            # a view: the lake is read once, into the qualified table below, not held twice
            self.con.execute(f"create or replace temp view {table}_lake as {' union all by name '.join(parts)}")
        self._frame(
            "network_sites",
            pl.DataFrame(
                inputs.sites,
                schema={"site": pl.String, "site_pb_mmhg": pl.Float64, "site_altitude_m": pl.Float64},
                orient="row",
            ),
        )
        self._frame(
            "network_unit_targets",
            pl.DataFrame(
                inputs.unit_targets,
                schema={
                    "site": pl.String,
                    "unit": pl.String,
                    "unit_type": pl.String,
                    "target_low_pct": pl.Float64,
                    "target_high_pct": pl.Float64,
                    "assessed": pl.Boolean,
                },
                orient="row",
            ),
        )
        self._frame("rule_catalogue", catalogue_frame)
        for table in inputs.files:
            columns = [c for c in self.columns(f"{table}_lake") if c != "site"] + ["site"]
            self.con.execute(f"create or replace temp table {table} as {network_input_sql(table, columns)}")
        self.con.execute(f"create or replace temp table unit_oxygen_targets as {UNIT_TARGETS_SQL}")
        for name, sql in SCOPE_SQL.items():
            self.con.execute(f"create or replace temp table {name} as {sql}")

    def _frame(self, name: str, frame: pl.DataFrame) -> None:
        self.con.register(f"{name}_frame", frame)
        self.con.execute(f"create or replace temp table {name} as select * from {name}_frame")
        self.con.unregister(f"{name}_frame")

    def columns(self, relation: str) -> list[str]:
        return [d[0] for d in self.con.execute(f"select * from {relation} limit 0").description]

    def run(self, statement: Statement) -> None:
        sql = translate.to_duckdb(statement.text(self.columns))
        used = self.con.extract_statements(sql)[0].named_parameters
        self.con.execute(sql, {k: v for k, v in statement.params.items() if k in used})

    def output(self, table: str) -> pl.DataFrame:
        return self.con.sql(output_sql(table, self.columns(table))).pl()

    def empty(self, table: str) -> pl.DataFrame:
        """The columns of an output as written (no site: it is the partition), no rows."""
        return self.con.sql(f"{output_sql(table, self.columns(table))} limit 0").pl().drop("site")

    def write(self, table: str, folder: Path) -> None:
        folder.mkdir(parents=True, exist_ok=True)
        self.con.execute(
            f"copy ({output_sql(table, self.columns(table))}) to '{folder / table}' "
            "(format parquet, partition_by (site), overwrite_or_ignore)"
        )

    def close(self) -> None:
        self.con.close()


def spark_session(
    master: str = "local[*]",
    *,
    app: str = "abg-audit network",
    # local mode: the driver is all of Spark; with 1g a broadcast join of the 200 k-row demo lake ran out
    # of memory (Java takes the heap as it needs it, up to this)
    memory: str = "4g",
    shuffle_partitions: int = 4,
    extra: dict[str, str] | None = None,
) -> Any:
    """A Spark session for the network run: UTC, no UI; any master (local[n], spark://, yarn, k8s)."""
    import warnings

    with warnings.catch_warnings():
        # pyspark 4.3 warns on import that it does not fully support pandas 3; the network run uses
        # no pandas conversion (outputs go through Arrow), so the warning is noise in an operator's log
        warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas", category=FutureWarning)
        from pyspark.sql import SparkSession

    builder = (
        SparkSession.builder.master(master)
        .appName(app)
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.shuffle.partitions", str(shuffle_partitions))
        .config("spark.driver.memory", memory)
        .config("spark.sql.ansi.enabled", "false")
        .config("spark.driver.bindAddress", "127.0.0.1")
        .config("spark.driver.host", "127.0.0.1")
    )
    for name, value in (extra or {}).items():
        builder = builder.config(name, value)
    session = builder.getOrCreate()
    session.sparkContext.setLogLevel("ERROR")
    return session


class SparkEngine:
    """Each relation a stage statement makes is written to Parquet under ``work`` and read back: the
    later statements read it many times, and reading it back cuts its lineage, so the plans of the
    twenty-odd inserts into ``flags`` do not grow one inside the other (they did, with a cache: each
    insert planned every earlier one again, until the driver ran out of memory). An insert writes
    only its new rows, as one more part of the relation."""

    name = "spark"

    def __init__(self, session: Any, work: Path) -> None:
        self.spark = session
        self.work = work
        self.parts: dict[str, list[str]] = {}
        self.untranslated: list[str] = []
        self._written = 0

    @property
    def views(self) -> set[str]:
        return set(self.parts)

    def _write(self, frame: Any) -> str:
        from pyspark.sql import functions as F
        from pyspark.sql.types import NullType, StringType

        # Parquet has no type for an untyped NULL column (a rule's "null as severity"): text.
        frame = frame.select(
            *[
                F.col(f"`{f.name}`").cast(StringType()).alias(f.name)
                if isinstance(f.dataType, NullType)
                else F.col(f"`{f.name}`")
                for f in frame.schema.fields
            ]
        )
        self._written += 1
        path = str(self.work / f"relation-{self._written:05d}")
        frame.write.mode("overwrite").parquet(path)
        return path

    def _publish(self, name: str) -> None:
        self.spark.read.parquet(*self.parts[name]).createOrReplaceTempView(name)

    def _view(self, name: str, frame: Any, *, checkpoint: bool = True) -> None:
        if not checkpoint:
            frame.createOrReplaceTempView(name)
            self.parts.setdefault(name, [])
            return
        self.parts[name] = [self._write(frame)]
        self._publish(name)

    def _append(self, name: str, frame: Any) -> None:
        self.parts[name].append(self._write(frame))
        self._publish(name)

    def load(self, inputs: LakeInputs, catalogue_frame: pl.DataFrame) -> None:
        from pyspark.sql import functions as F

        self.work.mkdir(parents=True, exist_ok=True)
        for table, per_site in inputs.files.items():
            frames = [
                self.spark.read.option("mergeSchema", "true").parquet(*sorted(paths)).withColumn("site", F.lit(site))
                for site, paths in sorted(per_site.items())
            ]
            union = frames[0]
            for frame in frames[1:]:
                union = union.unionByName(frame, allowMissingColumns=True)
            self._view(f"{table}_lake", union, checkpoint=False)
        self._rows("network_sites", inputs.sites, "site string, site_pb_mmhg double, site_altitude_m double")
        self._rows(
            "network_unit_targets",
            inputs.unit_targets,
            "site string, unit string, unit_type string, "
            "target_low_pct double, target_high_pct double, assessed boolean",
        )
        self._rows(
            "rule_catalogue",
            catalogue_frame.rows(),
            ", ".join(f"{c} {'boolean' if t == pl.Boolean else 'string'}" for c, t in catalogue_frame.schema.items()),
        )
        for table in inputs.files:
            columns = [c for c in self.columns(f"{table}_lake") if c != "site"] + ["site"]
            self._view(table, self.spark.sql(network_input_sql(table, columns)))
        self._view("unit_oxygen_targets", self.spark.sql(UNIT_TARGETS_SQL), checkpoint=False)
        for name, sql in SCOPE_SQL.items():
            self._view(name, self.spark.sql(sql), checkpoint=name == "scope_samples")

    def _rows(self, name: str, rows: list[tuple], schema: str) -> None:
        self._view(name, self.spark.createDataFrame(list(rows), schema=schema), checkpoint=False)

    def columns(self, relation: str) -> list[str]:
        return list(self.spark.table(relation).columns)

    def run(self, statement: Statement) -> None:
        try:
            tree = translate.prepare_spark(statement.text(self.columns), statement.params)
        except translate.Untranslatable:
            self.untranslated.append(statement.source)
            return
        _dispatch(self, tree)

    def sql(self, tree: exp.Expression) -> Any:
        return self.spark.sql(tree.sql(dialect="spark", unsupported_level=sqlglot.ErrorLevel.RAISE))

    def output(self, table: str) -> pl.DataFrame:
        if table not in self.views:
            raise KeyError(f"the Spark run made no {table} (untranslated: {self.untranslated})")
        return pl.from_arrow(self.spark.sql(output_sql(table, self.columns(table))).toArrow())

    def empty(self, table: str) -> pl.DataFrame:
        """The columns of an output as written (no site: it is the partition), no rows."""
        if table not in self.views:
            raise KeyError(f"the Spark run made no {table} (untranslated: {self.untranslated})")
        frame = self.spark.sql(output_sql(table, self.columns(table))).limit(0)
        return pl.from_arrow(frame.toArrow()).drop("site")

    def write(self, table: str, folder: Path) -> None:
        if table not in self.views:
            return
        frame = self.spark.sql(output_sql(table, self.columns(table)))
        frame.write.mode("overwrite").partitionBy("site").parquet(str(folder / table))

    def close(self) -> None:
        for view in self.views:
            self.spark.catalog.dropTempView(view)


def _table_name(node: exp.Expression) -> str:
    table = node.this if isinstance(node, exp.Schema) else node
    return table.name


def _dispatch(engine: SparkEngine, tree: exp.Expression) -> None:
    handlers: dict[type, Callable[[SparkEngine, Any], None]] = {
        exp.Create: _create,
        exp.Insert: _insert,
        exp.Delete: _delete,
        exp.Drop: _drop,
    }
    handler = handlers.get(type(tree))
    if handler is None:
        raise translate.Untranslatable(f"statement kind {type(tree).__name__}")
    handler(engine, tree)


def _create(engine: SparkEngine, tree: exp.Create) -> None:
    name = _table_name(tree.this)
    if tree.args.get("exists") and name in engine.views:
        return
    query = tree.expression
    if query is None:  # create table (column definitions): an empty view of those columns
        columns = [
            exp.alias_(exp.Cast(this=exp.Null(), to=d.args["kind"]), d.name)
            for d in tree.this.expressions
            if isinstance(d, exp.ColumnDef)
        ]
        query = exp.select(*columns).where(exp.false())
    engine._view(name, engine.sql(query))


def _drop(engine: SparkEngine, tree: exp.Drop) -> None:
    for table in tree.args.get("tables") or [tree.this]:
        name = _table_name(table)
        if name in engine.parts:
            del engine.parts[name]
            engine.spark.catalog.dropTempView(name)
        elif not tree.args.get("exists"):
            raise KeyError(f"drop of {name}, which the run never made")


def _insert(engine: SparkEngine, tree: exp.Insert) -> None:
    name = _table_name(tree.this)
    new = engine.sql(tree.expression)
    if isinstance(tree.this, exp.Schema):  # insert into t (a, b, ...) select: positional into the listed columns
        listed = [c.name for c in tree.this.expressions]
        new = new.toDF(*listed)
    elif not tree.args.get("by_name"):
        new = new.toDF(*engine.columns(name)[: len(new.columns)])
    current = engine.spark.table(name)
    from pyspark.sql import functions as F

    aligned = new.select(
        *[
            (F.col(c) if c in new.columns else F.lit(None)).cast(current.schema[c].dataType).alias(c)
            for c in current.columns
        ]
    )
    engine._append(name, aligned)


def _delete(engine: SparkEngine, tree: exp.Delete) -> None:
    """delete from t [as a] [using u ...] where c: keep the rows of t for which c is not true."""
    table = tree.this
    name = table.name
    alias = table.alias_or_name
    condition = tree.args["where"].this if tree.args.get("where") else exp.true()
    source = exp.Table(this=exp.to_identifier(name), alias=exp.TableAlias(this=exp.to_identifier(alias)))
    using = tree.args.get("using") or []
    if using:
        query = exp.select(exp.Column(this=exp.Star(), table=exp.to_identifier(alias))).from_(source)
        for other in using:
            query = query.join(other, on=condition, join_type="left anti")
    elif condition.find(exp.Exists, exp.Subquery, exp.Select):
        # a subquery condition (sample_id in (select ...), exists (...)) on non-NULL keys is true or
        # false, never NULL; Spark allows such a subquery only as a predicate of its own
        keep = exp.not_(exp.paren(condition))
        query = exp.select(exp.Column(this=exp.Star(), table=exp.to_identifier(alias))).from_(source).where(keep)
    else:
        keep = exp.not_(exp.func("coalesce", exp.paren(condition), exp.false()))
        query = exp.select(exp.Column(this=exp.Star(), table=exp.to_identifier(alias))).from_(source).where(keep)
    engine._view(name, engine.sql(query))


def read_lake(lake: Path, manifests: list[dict[str, Any]]) -> LakeInputs:
    files: dict[str, dict[str, list[str]]] = {}
    sites = []
    targets = []
    for manifest in manifests:
        site = manifest["site"]
        settings = manifest["settings"]
        sites.append((site, settings["barometric_pressure_mmhg"], settings["altitude_m"]))
        for unit, unit_type, low, high, assessed in settings["unit_targets"]:
            targets.append((site, unit, unit_type, low, high, assessed))
        for entry in manifest["files"]:
            files.setdefault(entry["table"], {}).setdefault(site, []).append(str((lake / entry["path"]).resolve()))
    for table, per_site in list(files.items()):
        if not per_site:
            del files[table]
    return LakeInputs(files=files, sites=sites, unit_targets=targets)
