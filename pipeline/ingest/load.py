"""Load one export file into the store in one transaction, losing no row.

read (text cells) -> parse (typed, reason codes) -> SQL: canonical units, hard limits,
duplicates and corrections -> records / quarantine / superseded_records, plus the
ledger row. Either all of that commits or none of it does.

The same path loads every kind of record (``profile.record``, a ``RecordSpec`` of
``pipeline.schema``): blood gas samples into ``records``, oxygen prescriptions into
``prescriptions`` (corrections to ``superseded_prescriptions``). Per kind only the field
catalogue, the key, the stage 1 and stage 3 SQL and the tables differ; reading, parsing,
pseudonyms, duplicates, quarantine, reconciliation and the ledger are shared. The
great-expectations batch contract runs for samples only (``RecordSpec.batch_contract``):
a prescription's checks are its row reasons (required fields, hard limits,
``TARGET_RANGE_INVALID``, ``END_BEFORE_START``) and the whole-file checks.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Protocol

import duckdb
import polars as pl

from pipeline.contract import ContractOutcome, ContractSettings, keep_results, validate_stage
from pipeline.errors import FileRejected
from pipeline.ingest import engine
from pipeline.ingest.parse import (
    FAILED,
    REASON,
    STATUS,
    UNIT_SUFFIX,
    ColumnPlan,
    FailureTally,
    empty_notes,
    parse_batch,
    plan_columns,
)
from pipeline.ingest.read import ROW, ExportReader, ParquetExport, RawExport, open_export
from pipeline.profile import Profile
from pipeline.pseudonym import PSEUDONYM_CHARS, hmac_pads
from pipeline.schema import POLARS_TYPES, PSEUDONYMISED, SAMPLES, TARGET_RANGE_PCT, UNIT_CHOICES, Kind, RecordSpec
from pipeline.sql_files import read_sql, run_sql
from pipeline.testhooks import pause_point

UNIT_FIELDS = SAMPLES.unit_fields
_STAGE_VIEWS = ("stage_converted", "stage_rows")  # over stage_units (sql/ingest/12_*, 15_*)
_STAGE_TABLES = (
    "stage_units",
    "stage_row_keys",
    "stage_repeated_rows",
    "stage_repeats",
    "stage_set_aside",
    "stage_held",
    "stage_keys_patient",
    "stage_keys_encounter",
    "stage_keys_operator",
)

# Median of each field after conversion must fall here, or the declared unit is wrong for
# the whole file (common practice: adult ranges, domain notes section 11).
UNIT_SANITY: dict[str, tuple[float, float]] = {
    "paco2_mmhg": (15.0, 150.0),
    "pao2_mmhg": (20.0, 700.0),
    "fio2": (0.19, 1.0),
    "temperature_c": (30.0, 43.0),
    "hb_g_dl": (3.0, 25.0),
}
_CONVERTER = {
    "paco2_mmhg": "pressure_to_mmhg",
    "pao2_mmhg": "pressure_to_mmhg",
    "fio2": "fio2_to_fraction",
    "temperature_c": "temperature_to_c",
    "hb_g_dl": "hb_to_g_dl",
}


class Replacing(Protocol):
    """Loading a held file again in place of what it loaded (``pipeline.reload.Replacement``).
    Both hooks run inside the file's transaction: ``before_merge`` right after it begins
    (it removes what the file loaded, including its ledger entry), ``after_merge`` after the
    merge and the new ledger entry, before the commit. Raising ``FileRejected`` in either
    rejects the file and rolls everything back."""

    def before_merge(self, con: duckdb.DuckDBPyConnection, outcome: FileOutcome) -> None: ...

    def after_merge(self, con: duckdb.DuckDBPyConnection, outcome: FileOutcome) -> None: ...


@dataclass
class FileOutcome:
    path: Path
    profile: str
    sha256: str = ""
    size_bytes: int = 0
    outcome: str = "loaded"  # loaded, already_loaded, rejected
    kind: str = "samples"  # the input kind: samples or prescriptions
    reason_code: str | None = None
    message: str | None = None
    rows_in: int = 0
    rows_loaded: int = 0
    rows_quarantined: int = 0
    rows_duplicate: int = 0
    rows_superseded_in_file: int = 0
    corrections: int = 0
    notes: list[str] = field(default_factory=list)

    @property
    def balanced(self) -> bool:
        """Rows in = loaded + quarantined + duplicates + superseded; a rejected file takes in nothing."""
        if self.outcome != "loaded":
            return self.rows_loaded == self.rows_quarantined == self.rows_duplicate == 0
        parts = self.rows_loaded + self.rows_quarantined + self.rows_duplicate + self.rows_superseded_in_file
        return self.rows_in == parts


def file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _stage_frame(values: pl.DataFrame, record: RecordSpec, cells: pl.Series | None = None) -> pl.DataFrame:
    """Rows the Python parser read, shaped as ``stage_input``: every canonical column of the
    kind (NULL where unmapped), the per-row unit columns, and the stage bookkeeping columns
    (``__usual`` NULL marks rows parsed in Python; ``__cells`` their cells as text, for the
    quarantine)."""
    missing = [
        pl.lit(None, dtype=POLARS_TYPES[f.kind]).alias(f.name) for f in record.fields if f.name not in values.columns
    ]
    units = [
        pl.lit(None, dtype=pl.String).alias(f"{n}{UNIT_SUFFIX}")
        for n in record.unit_fields
        if f"{n}{UNIT_SUFFIX}" not in values.columns
    ]
    book = [
        pl.lit(None, dtype=pl.Boolean).alias("__usual"),
        (cells if cells is not None else pl.lit(None, dtype=pl.List(pl.String))).alias("__cells"),
        pl.lit(None, dtype=pl.Int64).alias("__nonblank"),
    ]
    return values.with_columns(missing + units).with_columns(book)


def _check_units(
    con: duckdb.DuckDBPyConnection,
    path: Path,
    profile: Profile,
    reader: ExportReader | ParquetExport,
    plan: ColumnPlan,
) -> None:
    if profile.record.unit_sanity_sql is None:
        return
    medians = con.execute(read_sql(profile.record.unit_sanity_sql)).fetchall()
    for field_name, count, median in medians:
        low, high = UNIT_SANITY[field_name]
        if count < 5 or median is None or low <= median <= high or field_name in profile.unit_columns:
            continue
        declared = profile.unit_of(field_name)
        source = profile.columns.get(field_name, field_name)
        raw_median = _raw_median(con, reader, plan, profile, field_name)
        hint = ""
        family = profile.record.fields_by_name[field_name].unit_family
        for alternative in UNIT_CHOICES[family or ""]:
            if alternative == declared or raw_median is None or raw_median[0] is None:
                continue
            converted = con.execute(f"select {_CONVERTER[field_name]}(?, ?)", [raw_median[0], alternative]).fetchall()[
                0
            ]
            if converted and converted[0] is not None and low <= converted[0] <= high:
                hint = f'; the values look like {alternative}: set [units] {field_name} = "{alternative}"'
                break
        raise FileRejected(
            "UNIT_MISMATCH",
            f"{path.name}: column {source!r} ({field_name}) has median {median:.3g} after converting from "
            f"{declared}, outside the plausible {low:g}-{high:g}{hint}",
        )


def _raw_median(
    con: duckdb.DuckDBPyConnection,
    reader: ExportReader | ParquetExport,
    plan: ColumnPlan,
    profile: Profile,
    field_name: str,
) -> tuple[float | None]:
    """Median of one field in the profile's unit over the parsed rows of the whole file.

    Only needed for the hint of a file rejected for its unit, so the file is parsed again
    rather than keeping every raw value while loading."""
    parts = []
    for batch in reader.batches():
        if batch.restart:
            parts = []
        values = parse_batch(batch, profile, plan, FailureTally(plan)).values
        parts.append(values.filter(pl.col(REASON).is_null()).select(pl.col(field_name).alias("value")))
    con.register("stage_raw_values", pl.concat(parts).to_arrow())
    try:
        return con.execute("select median(value) from stage_raw_values").fetchall()[0]
    finally:
        con.unregister("stage_raw_values")


@dataclass
class StagedFile:
    """What staging one file left behind besides the temp views ``stage_rows`` and
    ``stage_converted``."""

    rows_in: int
    malformed: list[tuple[int, str, str]]
    originals: pl.DataFrame  # source_row, original_text (cells as JSON) of every row with a reason


# Which parser types the cells: "sql" (DuckDB for the usual cells, the Python parser for
# the rest: pipeline/ingest/engine.py) or "python" (the Python parser for every cell, the
# way files were loaded before). Internal: tests/test_store_equivalence.py loads the demo
# both ways and compares the stores row for row.
PARSER = "sql"


def stage_parameters(profile: Profile) -> dict[str, str | float]:
    """The named parameters of the kind's stage 1 SQL: the unit the profile declares for each
    field ($unit_<field>) and the plausible target range of a prescription."""
    params: dict[str, str | float] = {f"unit_{name}": profile.unit_of(name) for name in profile.record.unit_fields}
    return params | {"target_min_pct": TARGET_RANGE_PCT[0], "target_max_pct": TARGET_RANGE_PCT[1]}


def _convert_sql(con: duckdb.DuckDBPyConnection, record: RecordSpec, unit_params: dict[str, str | float]) -> tuple[
    str, dict[str, str | float]
]:
    convert = read_sql(record.convert_sql).strip().rstrip(";")
    used = con.extract_statements(convert)[0].named_parameters
    return convert, {k: v for k, v in unit_params.items() if k in used}


def _stage_file(
    con: duckdb.DuckDBPyConnection,
    reader: ExportReader | ParquetExport,
    plan: ColumnPlan,
    profile: Profile,
    key: bytes,
    keep_patient_id: bool,
    unit_params: dict[str, str | float],
) -> StagedFile:
    """Parse and convert the whole file into the temp table ``stage_units`` (canonical
    units, hard limits), with the views ``stage_rows`` (the rows that count) and
    ``stage_converted`` (pseudonyms, content hash per row) over it, and register
    ``stage_notes``.

    DuckDB reads and types the file (``engine``); the Python reader and parser read only
    what DuckDB cannot (see ``engine``). Raises FileRejected for a fault of the whole file.
    """
    tally = FailureTally(plan)
    if PARSER == "python":
        staged, notes = _stage_in_python(con, reader, plan, profile, unit_params, tally)
    else:
        staged, notes = _stage_in_sql(con, reader, plan, profile, unit_params, tally)
    tally.check(reader.path)
    con.register("stage_notes", notes.to_arrow())
    _make_pseudonyms(con, key, profile.record)
    run_sql(con, "ingest/12_stage_rows.sql")
    run_sql(con, profile.record.keys_sql, keep_identifiers=keep_patient_id)
    return staged


def _make_pseudonyms(con: duckdb.DuckDBPyConnection, key: bytes, record: RecordSpec) -> None:
    """``stage_keys_<name>`` (identifier, pseudonym) for each identifier column of the
    samples' catalogue: every distinct identifier of the file hashed once, by DuckDB
    (``keyed_pseudonym`` in ``sql/ingest/14_keyed_pseudonym.sql``, the HMAC of
    ``pipeline.pseudonym``); empty for identifiers the kind does not hold."""
    run_sql(con, "ingest/14_keyed_pseudonym.sql")
    for column, (_output, domain) in PSEUDONYMISED.items():
        name = f"stage_keys_{column.removesuffix('_id')}"
        if column not in record.fields_by_name:
            con.execute(f"create or replace temp table {name} (identifier varchar, pseudonym varchar)")
            continue
        inner, outer = hmac_pads(key, domain)
        con.execute(
            f"create or replace temp table {name} as "
            f"select identifier, keyed_pseudonym(identifier, $inner, $outer, {PSEUDONYM_CHARS}) as pseudonym "
            f"from (select distinct {column} as identifier from stage_units where {column} is not null)",
            {"inner": inner, "outer": outer},
        )


def _stage_in_sql(
    con: duckdb.DuckDBPyConnection,
    reader: ExportReader | ParquetExport,
    plan: ColumnPlan,
    profile: Profile,
    unit_params: dict[str, str | float],
    tally: FailureTally,
) -> tuple[StagedFile, pl.DataFrame]:
    """DuckDB reads the file and stage 1 SQL converts it into ``stage_units`` in one pass;
    the rows with an unusual cell are then read by the Python parser and replace theirs."""
    record = profile.record
    convert, params = _convert_sql(con, record, unit_params)
    malformed: list[tuple[int, str, str]] = []
    parquet = isinstance(reader, ParquetExport)
    read = False
    if parquet:
        relation = f"read_parquet({engine.sql_text(str(reader.path))}, file_row_number = true)"
        described = con.execute(f"describe select * from {relation}").fetchall()
        types = {str(r[0]): str(r[1]) for r in described}
        refs = {h: engine.sql_name(h) for h in reader.header}
        select, fallible = engine.parse_relation(
            relation, refs, types, plan, profile, row="file_row_number + 1", keep_cells=False
        )
        try:
            con.execute(f"create or replace temp view stage_input as {select}")
            con.execute(f"create or replace temp table stage_units as {convert}", params)
        except duckdb.Error as err:
            raise FileRejected(
                "PARQUET_CORRUPT", f"{reader.path.name}: not a readable Parquet file ({type(err).__name__})"
            ) from None
        read = True
    elif isinstance(reader, ExportReader) and engine.duckdb_reads(profile):
        relation, refs, types = engine.csv_relation(str(reader.path), reader.header, profile)
        select, fallible = engine.parse_relation(relation, refs, types, plan, profile, row=None, keep_cells=True)
        con.execute(f"create or replace temp view stage_input as {select}")
        try:
            con.execute(f"create or replace temp table stage_units as {convert}", params)
            read = True
        except duckdb.InvalidInputException:
            pass  # a structural fault DuckDB will not read past: the Python reader names it
    if not read:
        assert isinstance(reader, ExportReader)
        malformed, fallible = _stage_cells_of_reader(con, reader, plan, profile, convert, params)
    con.execute("drop view if exists stage_input")
    rows_in = con.execute("select count(*) from stage_units").fetchall()[0][0] + len(malformed)

    # The unusual rows: parsed in Python, with the same stage 1 SQL.
    unusual = con.sql(
        "select coalesce(source_row, rowid + 1) as source_row, __cells from stage_units where not __usual "
        "order by source_row"
    ).pl()
    notes = empty_notes()
    if unusual.height:
        rows = unusual.get_column("source_row")
        if parquet:
            assert isinstance(reader, ParquetExport)
            cells = reader.read_rows(rows.to_list())
            kept = None
        else:
            cells = _cells_frame(unusual, reader.header)
            kept = unusual.get_column("__cells")
        parsed = parse_batch(RawExport(path=reader.path, cells=cells, header=reader.header), profile, plan, tally)
        notes = parsed.notes
        frame = _stage_frame(parsed.values, record, kept)
        con.register("stage_input", frame.to_arrow(compat_level=pl.CompatLevel.newest()))
        try:
            con.execute(f"insert into stage_units by name {convert}", params)
        finally:
            con.unregister("stage_input")
        if tally.failures:
            # Non-empty cells of the rows SQL typed: every such cell has a value (engine:
            # missing-value words go to the Python parser), per-row unit columns a bit each.
            fields = [f for f in plan.mapped if record.fields_by_name[f].kind is not Kind.TEXT]
            counts = con.execute(
                "select "
                + ", ".join([f"count({f})" for f in fields] + [f"sum((__nonblank >> {i}) & 1)::bigint"
                                                                for i in range(len(fallible))] + ["1"])
                + " from stage_units where __usual"
            ).fetchall()[0]
            sources = [plan.mapped[f] for f in fields] + fallible
            tally.add_non_empty({s: int(n or 0) for s, n in zip(sources, counts, strict=False)})

    # Original text of every quarantined row.
    bad = con.sql(
        "select coalesce(source_row, rowid + 1) as source_row, __cells from stage_units "
        "where reason_code is not null and __usual is distinct from false order by source_row"
    ).pl()
    if parquet and bad.height:
        assert isinstance(reader, ParquetExport)
        picked = reader.read_rows(bad.get_column("source_row").to_list())
        originals = _original_cells(picked, bad.get_column("source_row").to_list())
    elif bad.height:
        originals = _original_cells(_cells_frame(bad, reader.header), bad.get_column("source_row").to_list())
    else:
        originals = pl.DataFrame(schema={"source_row": pl.Int64, "original_text": pl.String})
    return StagedFile(rows_in=rows_in, malformed=malformed, originals=originals), notes


def _cells_frame(rows: pl.DataFrame, header: list[str]) -> pl.DataFrame:
    """Cells kept as a list per row (``__cells``) as a frame: ROW plus one text column per header."""
    return rows.select(
        pl.col("source_row").cast(pl.Int64).alias(ROW),
        *[pl.col("__cells").list.get(i).alias(h) for i, h in enumerate(header)],
    )


def _stage_cells_of_reader(
    con: duckdb.DuckDBPyConnection,
    reader: ExportReader,
    plan: ColumnPlan,
    profile: Profile,
    convert: str,
    params: dict[str, str | float],
) -> tuple[list[tuple[int, str, str]], list[str]]:
    """The Python reader's cells (a file DuckDB does not read), batch by batch, through the
    same SQL parse and stage 1 SQL into ``stage_units``; returns the malformed records."""
    malformed: list[tuple[int, str, str]] = []
    fallible: list[str] = []
    first = True
    for batch in reader.batches():
        if batch.restart:  # the file is read again record by record: forget the batches so far
            malformed, first = [], True
        malformed += batch.malformed
        refs = {h: engine.sql_name(h) for h in reader.header}
        types = dict.fromkeys(reader.header, "VARCHAR")
        select, fallible = engine.parse_relation(
            "stage_cells_batch", refs, types, plan, profile, row=engine.sql_name(ROW), keep_cells=True
        )
        con.register("stage_cells_batch", batch.cells.to_arrow())
        try:
            con.execute(f"create or replace temp view stage_input as {select}")
            target = "create or replace temp table stage_units as" if first else "insert into stage_units by name"
            con.execute(f"{target}\n{convert}", params)
        finally:
            con.execute("drop view if exists stage_input")
            con.unregister("stage_cells_batch")
        first = False
    return malformed, fallible


def _stage_in_python(
    con: duckdb.DuckDBPyConnection,
    reader: ExportReader | ParquetExport,
    plan: ColumnPlan,
    profile: Profile,
    unit_params: dict[str, str | float],
    tally: FailureTally,
) -> tuple[StagedFile, pl.DataFrame]:
    """Every cell through the Python reader and parser, batch by batch (``PARSER = "python"``)."""
    convert, params = _convert_sql(con, profile.record, unit_params)
    rows_in = 0
    malformed: list[tuple[int, str, str]] = []
    notes: list[pl.DataFrame] = [empty_notes()]
    originals: list[pl.DataFrame] = []
    first = True
    for batch in reader.batches():
        if batch.restart:  # the file is read again record by record: forget the batches so far
            tally.reset()
            rows_in, malformed, notes, originals, first = 0, [], [empty_notes()], [], True
        parsed = parse_batch(batch, profile, plan, tally)
        rows_in += batch.cells.height + len(batch.malformed)
        malformed += batch.malformed
        notes.append(parsed.notes)
        con.register("stage_input", _stage_frame(parsed.values, profile.record).to_arrow())
        try:
            target = "create or replace temp table stage_units as" if first else "insert into stage_units by name"
            con.execute(f"{target}\n{convert}", params)
        finally:
            con.unregister("stage_input")
        first = False
        if batch.cells.height:
            rows = batch.cells.get_column(ROW)
            bad = con.execute(
                "select source_row from stage_units "
                "where source_row between ? and ? and reason_code is not null order by source_row",
                [rows.min(), rows.max()],
            ).fetchall()
            if bad:
                originals.append(_original_cells(batch.cells, [r[0] for r in bad]))
    original = (
        pl.concat(originals)
        if originals
        else pl.DataFrame(schema={"source_row": pl.Int64, "original_text": pl.String})
    )
    return StagedFile(rows_in=rows_in, malformed=malformed, originals=original), pl.concat(notes)


def _original_cells(cells: pl.DataFrame, rows: list[int]) -> pl.DataFrame:
    """The cells of the given rows as one JSON object each (source header -> text)."""
    header = [c for c in cells.columns if c != ROW]
    picked = cells.filter(pl.col(ROW).is_in(rows))
    return picked.select(
        pl.col(ROW).alias("source_row"),
        pl.struct([pl.col(h).cast(pl.String) for h in header]).struct.json_encode().alias("original_text"),
    )


def ingest_file(
    con: duckdb.DuckDBPyConnection,
    path: Path,
    profile: Profile,
    run_id: str,
    key: bytes,
    *,
    keep_patient_id: bool = True,
    replacing: Replacing | None = None,
    contract_settings: ContractSettings | None = None,
) -> FileOutcome:
    """Load one file; never raises for a problem of the file itself (see ``outcome``).

    ``replacing`` loads a file the ledger already holds again, in place of what it loaded
    (``abg-audit reload``): its hooks run inside the file's transaction (``Replacing``).
    ``contract_settings``: the site's batch contract thresholds (``SiteConfig.contract``;
    the catalogue's when None)."""
    record = profile.record
    result = FileOutcome(path=path, profile=profile.name, kind=record.kind)
    try:
        result.size_bytes = path.stat().st_size
        result.sha256 = file_sha256(path)
    except OSError as err:
        result.outcome, result.reason_code = "rejected", "UNREADABLE"
        result.message = f"{path.name}: cannot be read ({err.strerror})"
        return result
    held = con.execute("select 1 from ingested_files where file_sha256 = ?", [result.sha256]).fetchall()
    if held and replacing is None:
        result.outcome = "already_loaded"
        return result
    try:
        reader = open_export(path, profile)
        plan = plan_columns(path, reader.header, profile)
    except FileRejected as err:
        result.outcome, result.reason_code, result.message = "rejected", err.reason_code, str(err)
        return result

    unit_params = stage_parameters(profile)
    names = {"run_id": run_id, "source_file": str(path), "file_sha256": result.sha256}
    contract: ContractOutcome | None = None
    in_transaction = False
    try:
        # Staging writes temp tables only, outside the file's transaction: committed temp
        # data can spill to disk under the memory limit, a transaction's own appends cannot.
        staged = _stage_file(con, reader, plan, profile, key, keep_patient_id, unit_params)
        result.notes = list(reader.notes)
        if plan.missing_optional:
            result.notes.append(f"optional columns absent: {', '.join(plan.missing_optional)}")
        if plan.extra_columns:
            result.notes.append(f"columns not mapped (ignored): {len(plan.extra_columns)}")
        result.rows_in = staged.rows_in
        _check_units(con, path, profile, reader, plan)
        # Classifying reads the file's stage only; outside the transaction its tables can spill.
        run_sql(con, "ingest/30_classify.sql")
        con.execute("begin transaction")
        in_transaction = True
        if replacing is not None:
            replacing.before_merge(con, result)
        if record.batch_contract:
            contract = validate_stage(con, path, run_id, result.sha256, settings=contract_settings)
            keep_results(con, contract)
            contract.raise_if_rejected()
        run_sql(con, "ingest/40_merge.sql", sql_names=record.sql_names, **names)
        if record.value_notes:
            run_sql(con, "ingest/40_merge_value_notes.sql", **names)
        _check_unique_keys(con, path, record)
        counts = con.execute(read_sql("ingest/50_counts.sql")).fetchall()[0]
        _parsed, quarantined, dup_in_file, superseded, new, corrected, dup_store = counts
        _quarantine_rows(con, staged.originals, staged.malformed, run_id, str(path), result.sha256, record)
        result.rows_quarantined = quarantined + len(staged.malformed)
        result.rows_duplicate = dup_in_file + dup_store
        result.rows_superseded_in_file = superseded
        result.rows_loaded = new + corrected
        result.corrections = corrected
        if not result.balanced:
            raise AssertionError(f"{path.name}: reconciliation failed {result}")
        con.execute(
            "insert into ingested_files (file_sha256, source_path, profile, size_bytes, run_id, loaded_at, rows_in, "
            "rows_loaded, rows_quarantined, rows_duplicate, rows_superseded_in_file, corrections, notes, kind, "
            "profile_sha256) values (?, ?, ?, ?, ?, now()::timestamp, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [
                result.sha256,
                str(path),
                profile.name,
                result.size_bytes,
                run_id,
                result.rows_in,
                result.rows_loaded,
                result.rows_quarantined,
                result.rows_duplicate,
                result.rows_superseded_in_file,
                result.corrections,
                "; ".join(result.notes),
                record.kind,
                profile.sha256 or None,
            ],
        )
        if replacing is not None:
            replacing.after_merge(con, result)
        pause_point("load")  # test-only: crash tests kill the run here, inside the file's transaction
        con.execute("commit")
        in_transaction = False
    except FileRejected as err:
        if in_transaction:
            con.execute("rollback")
        if contract is not None:  # the rollback took the file's contract results; keep them
            keep_results(con, contract, own_transaction=True)
        result.outcome, result.reason_code, result.message = "rejected", err.reason_code, str(err)
        result.rows_loaded = result.rows_quarantined = result.rows_duplicate = result.rows_superseded_in_file = 0
    except BaseException:
        if in_transaction:
            con.execute("rollback")
        raise
    finally:
        for view in ("stage_input", "stage_notes"):
            try:
                con.unregister(view)
            except duckdb.Error:
                pass
        # A big file's stage would hold memory into the later stages.
        stage = [("view", name) for name in _STAGE_VIEWS] + [("table", name) for name in _STAGE_TABLES]
        for kind, name in stage:
            try:
                con.execute(f"drop {kind} if exists {name}")
            except duckdb.Error:
                pass
    return result


class DuplicateKeyError(RuntimeError):
    """The store would hold a record key twice after a merge: a fault of the loader, not of
    the file, so the file's transaction is rolled back and the run stops."""


def _check_unique_keys(con: duckdb.DuckDBPyConnection, path: Path, record: RecordSpec) -> None:
    """The kind's table has no primary key (sql/schema/10_store.sql): prove the merge kept
    each key once among the keys of this file, before the file's transaction commits."""
    extra = con.execute(read_sql("ingest/45_unique_keys.sql").format_map(record.sql_names)).fetchall()[0][0]
    if extra:
        raise DuplicateKeyError(
            f"{path.name}: after the merge {record.table} would hold {extra} row(s) beyond one per "
            f"{record.key_field}; the file's load was rolled back"
        )


def _quarantine_rows(
    con: duckdb.DuckDBPyConnection,
    originals: pl.DataFrame,
    malformed: list[tuple[int, str, str]],
    run_id: str,
    source_file: str,
    sha256: str,
    record: RecordSpec,
) -> None:
    """Quarantine rows with the original cells as JSON, from the classified stage.

    ``record_id`` is the row's key whatever its kind; ``sample_id`` is filled for samples only."""
    bad = con.sql(
        "select source_row, record_id, reason_code, failed_columns from stage_set_aside "
        "where outcome = 'quarantined' order by source_row"
    ).pl()
    if bad.height:
        rows = bad.join(originals, on="source_row", how="left")
    else:
        rows = bad.with_columns(pl.lit(None, dtype=pl.String).alias("original_text"))
    if malformed:
        extra = pl.DataFrame(
            {
                "source_row": [m[0] for m in malformed],
                "record_id": [None] * len(malformed),
                "reason_code": [m[1] for m in malformed],
                "failed_columns": [None] * len(malformed),
                "original_text": [json.dumps(m[2]) for m in malformed],
            },
            schema={
                "source_row": pl.Int64,
                "record_id": pl.String,
                "reason_code": pl.String,
                "failed_columns": pl.String,
                "original_text": pl.String,
            },
        )
        rows = pl.concat([rows.cast(extra.schema), extra])  # type: ignore[arg-type]
    if rows.height == 0:
        return
    sample_id = pl.col("record_id") if record.key_field == "sample_id" else pl.lit(None, dtype=pl.String)
    rows = rows.with_columns(
        pl.lit(run_id).alias("run_id"),
        pl.lit(source_file).alias("source_file"),
        pl.lit(sha256).alias("file_sha256"),
        sample_id.alias("sample_id"),
        pl.lit(record.record_kind).alias("record_kind"),
    )
    con.register("quarantine_frame", rows.to_arrow())
    try:
        con.execute("insert into quarantine by name select * from quarantine_frame")
    finally:
        con.unregister("quarantine_frame")


__all__ = ["FAILED", "STATUS", "FileOutcome", "file_sha256", "ingest_file"]
