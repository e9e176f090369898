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
import queue
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Protocol

import duckdb
import polars as pl
import pyarrow as pa

from pipeline.contract import ContractOutcome, keep_results, validate_stage
from pipeline.errors import FileRejected
from pipeline.ingest.parse import (
    FAILED,
    REASON,
    STATUS,
    UNIT_SUFFIX,
    ColumnPlan,
    FailureTally,
    parse_batch,
    plan_columns,
)
from pipeline.ingest.read import ROW, ExportReader, ParquetExport, RawExport, open_export
from pipeline.profile import Profile
from pipeline.pseudonym import add_pseudonym
from pipeline.schema import POLARS_TYPES, PSEUDONYMISED, SAMPLES, TARGET_RANGE_PCT, UNIT_CHOICES, RecordSpec
from pipeline.sql_files import read_sql, run_sql
from pipeline.testhooks import pause_point

UNIT_FIELDS = SAMPLES.unit_fields
_STAGE_TABLES = ("stage_converted", "stage_repeats", "stage_set_aside", "stage_held")

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


def _stage_frame(values: pl.DataFrame, key: bytes, keep_patient_id: bool, record: RecordSpec) -> pl.DataFrame:
    """Every canonical column of the kind present (NULL where unmapped), the pseudonym of
    each identifier (raw identifiers dropped unless the site keeps them), plus per-row
    unit columns."""
    frame = values
    for column, (output, domain) in PSEUDONYMISED.items():
        if column not in record.fields_by_name:
            continue
        frame = add_pseudonym(frame, key, column, output, domain)
        if not keep_patient_id and column in frame.columns:
            frame = frame.with_columns(pl.lit(None, dtype=pl.String).alias(column))
    missing = [
        pl.lit(None, dtype=POLARS_TYPES[f.kind]).alias(f.name) for f in record.fields if f.name not in frame.columns
    ]
    units = [
        pl.lit(None, dtype=pl.String).alias(f"{n}{UNIT_SUFFIX}")
        for n in record.unit_fields
        if f"{n}{UNIT_SUFFIX}" not in frame.columns
    ]
    return frame.with_columns(missing + units)


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
    """What staging one file left behind besides the temp table ``stage_converted``."""

    rows_in: int
    malformed: list[tuple[int, str, str]]
    originals: pl.DataFrame  # source_row, original_text (cells as JSON) of every row with a reason


@dataclass
class _Prepared:
    """One batch ready for DuckDB: its cells, its parse and the stage frame as Arrow."""

    batch: RawExport
    notes: pl.DataFrame
    stage: pa.Table


@dataclass
class _Failed:
    error: BaseException


def _prepare(
    reader: ExportReader | ParquetExport,
    plan: ColumnPlan,
    profile: Profile,
    key: bytes,
    keep_patient_id: bool,
    tally: FailureTally,
) -> Iterator[_Prepared]:
    for batch in reader.batches():
        if batch.restart:
            tally.reset()
        parsed = parse_batch(batch, profile, plan, tally)
        stage = _stage_frame(parsed.values, key, keep_patient_id, profile.record)
        yield _Prepared(batch, parsed.notes, stage.to_arrow(compat_level=pl.CompatLevel.newest()))


def _ahead(items: Iterator[_Prepared]) -> Iterator[_Prepared]:
    """Produce the next item in a thread while the caller works on this one.

    Reading and parsing (polars, Python) overlap with staging (DuckDB); both release the
    interpreter lock for their heavy work. At most one item waits, so memory stays bounded.
    """
    waiting: queue.Queue[_Prepared | _Failed | None] = queue.Queue(maxsize=1)
    stop = threading.Event()

    def put(item: _Prepared | _Failed | None) -> bool:
        while not stop.is_set():
            try:
                waiting.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def produce() -> None:
        try:
            for item in items:
                if not put(item):
                    return
            put(None)
        except BaseException as err:  # handed to the caller, raised there
            put(_Failed(err))

    worker = threading.Thread(target=produce, name="ingest-prepare", daemon=True)
    worker.start()
    try:
        while (item := waiting.get()) is not None:
            if isinstance(item, _Failed):
                raise item.error
            yield item
    finally:
        stop.set()
        worker.join()


def _stage_file(
    con: duckdb.DuckDBPyConnection,
    reader: ExportReader | ParquetExport,
    plan: ColumnPlan,
    profile: Profile,
    key: bytes,
    keep_patient_id: bool,
    unit_params: dict[str, str | float],
) -> StagedFile:
    """Parse the file batch by batch into the temp table ``stage_converted`` (canonical units,
    hard limits, content hash per row); register ``stage_notes``. Memory stays bounded by
    the batch size whatever the size of the file.

    Raises FileRejected for a fault of the whole file, after every batch was counted.
    """
    convert = read_sql(profile.record.convert_sql).strip().rstrip(";")
    used = con.extract_statements(convert)[0].named_parameters
    params = {k: v for k, v in unit_params.items() if k in used}
    tally = FailureTally(plan)
    rows_in = 0
    malformed: list[tuple[int, str, str]] = []
    notes: list[pl.DataFrame] = []
    originals: list[pl.DataFrame] = []
    first = True
    for prepared in _ahead(_prepare(reader, plan, profile, key, keep_patient_id, tally)):
        batch = prepared.batch
        if batch.restart:  # the file is read again record by record: forget the batches so far
            rows_in, malformed, notes, originals, first = 0, [], [], [], True
        rows_in += batch.cells.height + len(batch.malformed)
        malformed += batch.malformed
        notes.append(prepared.notes)
        con.register("stage_input", prepared.stage)
        target = "create or replace temp table stage_converted as" if first else "insert into stage_converted"
        con.execute(f"{target}\n{convert}", params)
        first = False
        if batch.cells.height:
            rows = batch.cells.get_column(ROW)
            bad = con.execute(
                "select source_row from stage_converted "
                "where source_row between ? and ? and reason_code is not null order by source_row",
                [rows.min(), rows.max()],
            ).fetchall()
            if bad:
                originals.append(_original_cells(batch.cells, [r[0] for r in bad]))
    tally.check(reader.path)
    con.register("stage_notes", pl.concat(notes).to_arrow())
    original = (
        pl.concat(originals)
        if originals
        else pl.DataFrame(schema={"source_row": pl.Int64, "original_text": pl.String})
    )
    return StagedFile(rows_in=rows_in, malformed=malformed, originals=original)


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
) -> FileOutcome:
    """Load one file; never raises for a problem of the file itself (see ``outcome``).

    ``replacing`` loads a file the ledger already holds again, in place of what it loaded
    (``abg-audit reload``): its hooks run inside the file's transaction (``Replacing``)."""
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

    unit_params: dict[str, str | float] = {f"unit_{name}": profile.unit_of(name) for name in record.unit_fields}
    unit_params |= {"target_min_pct": TARGET_RANGE_PCT[0], "target_max_pct": TARGET_RANGE_PCT[1]}
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
        con.execute("begin transaction")
        in_transaction = True
        if replacing is not None:
            replacing.before_merge(con, result)
        if record.batch_contract:
            contract = validate_stage(con, path, run_id, result.sha256)
            keep_results(con, contract)
            contract.raise_if_rejected()
        run_sql(con, "ingest/30_classify.sql")
        run_sql(con, record.merge_sql, **names)
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
        for table in _STAGE_TABLES:  # a big file's stage would hold memory into the later stages
            try:
                con.execute(f"drop table if exists {table}")
            except duckdb.Error:
                pass
    return result


class DuplicateKeyError(RuntimeError):
    """The store would hold a record key twice after a merge: a fault of the loader, not of
    the file, so the file's transaction is rolled back and the run stops."""


def _check_unique_keys(con: duckdb.DuckDBPyConnection, path: Path, record: RecordSpec) -> None:
    """The kind's table has no primary key (sql/schema/10_store.sql): prove the merge kept
    each key once among the keys of this file, before the file's transaction commits."""
    extra = con.execute(read_sql(record.unique_keys_sql)).fetchall()[0][0]
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
