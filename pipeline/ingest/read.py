"""Read one export file into a frame of text cells, exactly as the profile declares.

Every cell stays text here (Parquet columns keep their native types); ``parse`` turns
text into values so each failure can get its own reason code. Records whose structure
is broken (wrong number of fields, an unterminated quote) come back as quarantine rows,
never silently dropped. Faults that hit the whole file raise ``FileRejected``.

Row numbers are data-record numbers: 1 is the first record after the header, counting
records, not physical lines (a quoted newline does not start a new record). Blank lines
and rows of only empty cells are not records and are not counted.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from pipeline.errors import FileRejected
from pipeline.profile import Profile

ROW = "__row"
BOM = b"\xef\xbb\xbf"
# Cap the size of a single export so a runaway or wrong file cannot exhaust memory.
MAX_FILE_BYTES = 8 * 1024**3


@dataclass
class RawExport:
    """Cells of one export file plus the records that could not be split into cells."""

    path: Path
    cells: pl.DataFrame  # column ROW (1-based record number) + one column per source header
    header: list[str]
    malformed: list[tuple[int, str, str]] = field(default_factory=list)  # (row, reason, raw text)
    notes: list[str] = field(default_factory=list)


def _decode(path: Path, data: bytes, profile: Profile) -> tuple[str | None, list[str]]:
    """Check the bytes against the declared encoding; return text only when re-encoding is needed."""
    notes: list[str] = []
    if b"\x00" in data[: 1 << 20]:
        raise FileRejected("BINARY_FILE", f"{path.name}: contains NUL bytes; not a text export")
    if profile.encoding == "utf-8":
        try:
            data.decode("utf-8")
        except UnicodeDecodeError as err:
            line = data.count(b"\n", 0, err.start) + 1
            raise FileRejected(
                "ENCODING_INVALID",
                f"{path.name}: line {line} is not valid UTF-8 (byte 0x{data[err.start]:02x}); "
                'the profile declares utf-8 - if the export is Latin-1 set encoding = "latin-1"',
            ) from None
        return None, notes
    try:
        text = data.decode(profile.encoding)
    except UnicodeDecodeError as err:
        line = data.count(b"\n", 0, err.start) + 1
        raise FileRejected(
            "ENCODING_INVALID", f"{path.name}: line {line} cannot be decoded as {profile.encoding}"
        ) from None
    notes.append(f"decoded from {profile.encoding}")
    return text, notes


def _header(path: Path, text_head: str, profile: Profile) -> list[str]:
    # strict, like the record-by-record split, so a header either splits the same way there or is rejected here
    reader = csv.reader(io.StringIO(text_head), delimiter=profile.delimiter, quotechar=profile.quote_char, strict=True)
    try:
        header = next(reader)
    except StopIteration:
        raise FileRejected("EMPTY_FILE", f"{path.name}: no header line") from None
    except csv.Error:
        raise FileRejected(
            "MALFORMED_HEADER", f"{path.name}: the header line cannot be split into columns (unbalanced quote)"
        ) from None
    header = [h.strip() for h in header]
    folded = [h.casefold() for h in header]
    repeated = [str(number) for number, f in enumerate(folded, start=1) if folded.count(f) > 1]
    if repeated:
        # Positions, not names: in a file without its header line the "names" are a patient's data.
        raise FileRejected(
            "DUPLICATE_COLUMN",
            f"{path.name}: header columns {', '.join(repeated)} have the same name (ignoring case); "
            "each column must be named once",
        )
    return header


def _slow_split(text: str, header: list[str], profile: Profile) -> tuple[list[list[str]], list[int], list]:
    """Split records one by one (Python csv) so each malformed record can be named."""
    reader = csv.reader(io.StringIO(text), delimiter=profile.delimiter, quotechar=profile.quote_char, strict=True)
    next(reader, None)  # header
    rows: list[list[str]] = []
    numbers: list[int] = []
    malformed: list[tuple[int, str, str]] = []
    record = 0
    ends_with_newline = text.endswith(("\n", "\r"))
    while True:
        try:
            fields = next(reader)
        except StopIteration:
            break
        except csv.Error:
            record += 1
            malformed.append((record, "UNTERMINATED_QUOTE", "(record could not be split: unbalanced quote)"))
            continue
        if all(not f.strip() for f in fields):
            continue  # blank line or a row of empty cells: not a record
        record += 1
        if len(fields) == len(header):
            rows.append(fields)
            numbers.append(record)
        elif len(fields) > len(header):
            malformed.append((record, "TOO_MANY_FIELDS", profile.delimiter.join(fields)))
        else:
            malformed.append((record, "TOO_FEW_FIELDS", profile.delimiter.join(fields)))
    # A short last record in a file that does not end with a newline was cut off mid-write.
    if malformed and not ends_with_newline and malformed[-1][0] == record and malformed[-1][1] == "TOO_FEW_FIELDS":
        last = malformed[-1]
        malformed[-1] = (last[0], "TRUNCATED_RECORD", last[2])
    return rows, numbers, malformed


def read_export(path: Path, profile: Profile) -> RawExport:
    """Read one file under its profile. Raises FileRejected for whole-file faults."""
    try:
        size = path.stat().st_size
    except OSError as err:
        raise FileRejected("UNREADABLE", f"{path.name}: cannot be read ({err.strerror})") from None
    if size == 0:
        raise FileRejected("EMPTY_FILE", f"{path.name}: file is empty (0 bytes); the export probably failed")
    if size > MAX_FILE_BYTES:
        raise FileRejected("OVERSIZE", f"{path.name}: {size} bytes exceeds the {MAX_FILE_BYTES} byte limit")
    if profile.format == "parquet":
        return _read_parquet(path)
    try:
        data = path.read_bytes()
    except OSError as err:
        raise FileRejected("UNREADABLE", f"{path.name}: cannot be read ({err.strerror})") from None
    notes: list[str] = []
    if data.startswith(BOM):
        data = data[len(BOM) :]
        notes.append("BOM_STRIPPED")
    if not data.strip():
        raise FileRejected("EMPTY_FILE", f"{path.name}: file holds only whitespace")
    text, decode_notes = _decode(path, data, profile)
    notes += decode_notes
    if text is not None:
        data = text.encode("utf-8")
    head = text[:65536] if text is not None else data[:65536].decode("utf-8", errors="replace")
    header = _header(path, head, profile)
    if len(header) == 1 and profile.delimiter not in head.split("\n", 1)[0]:
        others = [d for d in (",", ";", "\t", "|") if d != profile.delimiter and d in header[0]]
        hint = f" but the header contains {others[0]!r}" if others else ""
        raise FileRejected(
            "DIALECT_MISMATCH",
            f"{path.name}: header has a single column: the profile declares delimiter {profile.delimiter!r}{hint}",
        )

    ends_with_newline = data.endswith((b"\n", b"\r"))
    cells: pl.DataFrame | None = None
    malformed: list[tuple[int, str, str]] = []
    if ends_with_newline:
        try:
            cells = pl.read_csv(
                data,
                has_header=True,
                new_columns=header,
                separator=profile.delimiter,
                quote_char=profile.quote_char or None,
                infer_schema=False,
                empty_string_is_null=False,
                raise_if_empty=False,
                truncate_ragged_lines=False,
            )
        except pl.exceptions.PolarsError:
            cells = None  # structural fault somewhere: split record by record to name it
    if cells is None:
        if text is None:
            text = data.decode("utf-8")
        rows, numbers, malformed = _slow_split(text, header, profile)
        cells = pl.DataFrame(
            {name: [r[i] for r in rows] for i, name in enumerate(header)},
            schema={name: pl.String for name in header},
        ).with_columns(pl.Series(ROW, numbers, dtype=pl.Int64))
    else:
        blank = pl.all_horizontal(pl.col(header).fill_null("").str.strip_chars() == "")
        cells = cells.filter(~blank).with_row_index(ROW, offset=1).with_columns(pl.col(ROW).cast(pl.Int64))
    cells = cells.select([ROW, *header])
    return RawExport(path=path, cells=cells, header=header, malformed=malformed, notes=notes)


def _read_parquet(path: Path) -> RawExport:
    try:
        frame = pl.read_parquet(path)
    except Exception as err:
        detail = type(err).__name__
        raise FileRejected("PARQUET_CORRUPT", f"{path.name}: not a readable Parquet file ({detail})") from None
    header = frame.columns
    folded = [h.casefold() for h in header]
    dupes = sorted({h for h, f in zip(header, folded, strict=True) if folded.count(f) > 1})
    if dupes:
        raise FileRejected("DUPLICATE_COLUMN", f"{path.name}: columns differ only by case: {', '.join(dupes)}")
    cells = frame.with_row_index(ROW, offset=1).with_columns(pl.col(ROW).cast(pl.Int64))
    return RawExport(path=path, cells=cells, header=header)
