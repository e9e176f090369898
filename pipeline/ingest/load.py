"""Load one export file into the store in one transaction, losing no row.

read (text cells) -> parse (typed, reason codes) -> SQL: canonical units, hard limits,
duplicates and corrections -> records / quarantine / superseded_records, plus the
ledger row. Either all of that commits or none of it does.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import polars as pl

from pipeline.contract import ContractOutcome, keep_results, validate_stage
from pipeline.errors import FileRejected
from pipeline.ingest.parse import FAILED, REASON, STATUS, UNIT_SUFFIX, parse_export
from pipeline.ingest.read import ROW, read_export
from pipeline.profile import Profile
from pipeline.pseudonym import add_patient_key
from pipeline.schema import FIELDS, UNIT_CHOICES, Kind
from pipeline.sql_files import read_sql, run_sql
from pipeline.testhooks import pause_point

_POLARS_TYPES = {
    Kind.TEXT: pl.String,
    Kind.CODE: pl.String,
    Kind.NUMBER: pl.Float64,
    Kind.TIMESTAMP: pl.Datetime("us"),
    Kind.DATE: pl.Date,
    Kind.BOOLEAN: pl.Boolean,
}
UNIT_FIELDS = tuple(f.name for f in FIELDS if f.unit_family is not None)

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


@dataclass
class FileOutcome:
    path: Path
    profile: str
    sha256: str = ""
    size_bytes: int = 0
    outcome: str = "loaded"  # loaded, already_loaded, rejected
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


def _stage_frame(values: pl.DataFrame, key: bytes, keep_patient_id: bool) -> pl.DataFrame:
    """Every canonical column present (NULL where unmapped), plus per-row unit columns."""
    frame = add_patient_key(values, key)
    if not keep_patient_id and "patient_id" in frame.columns:
        frame = frame.with_columns(pl.lit(None, dtype=pl.String).alias("patient_id"))
    missing = [pl.lit(None, dtype=_POLARS_TYPES[f.kind]).alias(f.name) for f in FIELDS if f.name not in frame.columns]
    units = [
        pl.lit(None, dtype=pl.String).alias(f"{n}{UNIT_SUFFIX}")
        for n in UNIT_FIELDS
        if f"{n}{UNIT_SUFFIX}" not in frame.columns
    ]
    return frame.with_columns(missing + units)


def _check_units(con: duckdb.DuckDBPyConnection, path: Path, profile: Profile) -> None:
    medians = con.execute(read_sql("ingest/20_unit_sanity.sql")).fetchall()
    for field_name, count, median in medians:
        low, high = UNIT_SANITY[field_name]
        if count < 5 or median is None or low <= median <= high or field_name in profile.unit_columns:
            continue
        declared = profile.unit_of(field_name)
        source = profile.columns.get(field_name, field_name)
        raw_median = con.execute(f"select median({field_name}) from stage_input where {REASON} is null").fetchall()[0]
        hint = ""
        family = next(f.unit_family for f in FIELDS if f.name == field_name)
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


def ingest_file(
    con: duckdb.DuckDBPyConnection,
    path: Path,
    profile: Profile,
    run_id: str,
    key: bytes,
    *,
    keep_patient_id: bool = True,
) -> FileOutcome:
    """Load one file; never raises for a problem of the file itself (see ``outcome``)."""
    result = FileOutcome(path=path, profile=profile.name)
    try:
        result.size_bytes = path.stat().st_size
        result.sha256 = file_sha256(path)
    except OSError as err:
        result.outcome, result.reason_code = "rejected", "UNREADABLE"
        result.message = f"{path.name}: cannot be read ({err.strerror})"
        return result
    held = con.execute("select 1 from ingested_files where file_sha256 = ?", [result.sha256]).fetchall()
    if held:
        result.outcome = "already_loaded"
        return result
    try:
        raw = read_export(path, profile)
        parsed = parse_export(raw, profile)
    except FileRejected as err:
        result.outcome, result.reason_code, result.message = "rejected", err.reason_code, str(err)
        return result
    result.notes = list(raw.notes)
    if parsed.missing_optional:
        result.notes.append(f"optional columns absent: {', '.join(parsed.missing_optional)}")
    if parsed.extra_columns:
        result.notes.append(f"columns not mapped (ignored): {len(parsed.extra_columns)}")
    result.rows_in = raw.cells.height + len(raw.malformed)

    stage = _stage_frame(parsed.values, key, keep_patient_id).to_arrow()
    notes = parsed.notes.to_arrow()
    unit_params = {f"unit_{name}": profile.unit_of(name) for name in UNIT_FIELDS}
    names = {"run_id": run_id, "source_file": str(path), "file_sha256": result.sha256}
    contract: ContractOutcome | None = None
    con.execute("begin transaction")
    try:
        con.register("stage_input", stage)
        con.register("stage_notes", notes)
        run_sql(con, "ingest/10_convert.sql", **unit_params)
        _check_units(con, path, profile)
        contract = validate_stage(con, path, run_id, result.sha256)
        keep_results(con, contract)
        contract.raise_if_rejected()
        run_sql(con, "ingest/30_classify.sql")
        run_sql(con, "ingest/40_merge.sql", **names)
        counts = con.execute(read_sql("ingest/50_counts.sql")).fetchall()[0]
        _parsed, quarantined, dup_in_file, superseded, new, corrected, dup_store = counts
        _quarantine_rows(con, raw.cells, raw.malformed, run_id, str(path), result.sha256)
        result.rows_quarantined = quarantined + len(raw.malformed)
        result.rows_duplicate = dup_in_file + dup_store
        result.rows_superseded_in_file = superseded
        result.rows_loaded = new + corrected
        result.corrections = corrected
        if not result.balanced:
            raise AssertionError(f"{path.name}: reconciliation failed {result}")
        con.execute(
            "insert into ingested_files values (?, ?, ?, ?, ?, now()::timestamp, ?, ?, ?, ?, ?, ?, ?)",
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
            ],
        )
        pause_point("load")  # test-only: crash tests kill the run here, inside the file's transaction
        con.execute("commit")
    except FileRejected as err:
        con.execute("rollback")
        if contract is not None:  # the rollback took the file's contract results; keep them
            keep_results(con, contract, own_transaction=True)
        result.outcome, result.reason_code, result.message = "rejected", err.reason_code, str(err)
        result.rows_loaded = result.rows_quarantined = result.rows_duplicate = result.rows_superseded_in_file = 0
    except BaseException:
        con.execute("rollback")
        raise
    finally:
        for view in ("stage_input", "stage_notes"):
            try:
                con.unregister(view)
            except duckdb.Error:
                pass
    return result


def _quarantine_rows(
    con: duckdb.DuckDBPyConnection,
    cells: pl.DataFrame,
    malformed: list[tuple[int, str, str]],
    run_id: str,
    source_file: str,
    sha256: str,
) -> None:
    """Quarantine rows with the original cells as JSON, from the classified stage."""
    bad = con.sql(
        "select source_row, sample_id, reason_code, failed_columns from stage_checked where outcome = 'quarantined'"
    ).pl()
    header = [c for c in cells.columns if c != ROW]
    if bad.height:
        original = cells.join(bad.select(pl.col("source_row").alias(ROW)), on=ROW, how="semi").select(
            pl.col(ROW),
            pl.struct([pl.col(h).cast(pl.String) for h in header]).struct.json_encode().alias("original_text"),
        )
        rows = bad.join(original, left_on="source_row", right_on=ROW, how="left")
    else:
        rows = bad.with_columns(pl.lit(None, dtype=pl.String).alias("original_text"))
    if malformed:
        extra = pl.DataFrame(
            {
                "source_row": [m[0] for m in malformed],
                "sample_id": [None] * len(malformed),
                "reason_code": [m[1] for m in malformed],
                "failed_columns": [None] * len(malformed),
                "original_text": [json.dumps(m[2]) for m in malformed],
            },
            schema={
                "source_row": pl.Int64,
                "sample_id": pl.String,
                "reason_code": pl.String,
                "failed_columns": pl.String,
                "original_text": pl.String,
            },
        )
        rows = pl.concat([rows.cast(extra.schema), extra])  # type: ignore[arg-type]
    if rows.height == 0:
        return
    rows = rows.with_columns(
        pl.lit(run_id).alias("run_id"), pl.lit(source_file).alias("source_file"), pl.lit(sha256).alias("file_sha256")
    )
    con.register("quarantine_frame", rows.to_arrow())
    try:
        con.execute("insert into quarantine by name select * from quarantine_frame")
    finally:
        con.unregister("quarantine_frame")


__all__ = ["FAILED", "STATUS", "FileOutcome", "file_sha256", "ingest_file"]
