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

import codecs
import csv
import io
from collections.abc import Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path

import polars as pl

from pipeline.errors import FileRejected
from pipeline.profile import Profile

ROW = "__row"
BOM = b"\xef\xbb\xbf"
# Cap the size of a single export so a runaway or wrong file cannot exhaust memory.
MAX_FILE_BYTES = 8 * 1024**3
# Records parsed and staged at a time: bounds memory whatever the size of the file.
BATCH_ROWS = 100_000
_BLOCK_BYTES = 1 << 24
_HEAD_BYTES = 1 << 20


@dataclass
class RawExport:
    """Cells of one export file plus the records that could not be split into cells."""

    path: Path
    cells: pl.DataFrame  # column ROW (1-based record number) + one column per source header
    header: list[str]
    malformed: list[tuple[int, str, str]] = field(default_factory=list)  # (row, reason, raw text)
    notes: list[str] = field(default_factory=list)
    restart: bool = False  # batches handed out before this one are void; this one holds every record


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


def _stat_size(path: Path) -> int:
    try:
        size = path.stat().st_size
    except OSError as err:
        raise FileRejected("UNREADABLE", f"{path.name}: cannot be read ({err.strerror})") from None
    if size == 0:
        raise FileRejected("EMPTY_FILE", f"{path.name}: file is empty (0 bytes); the export probably failed")
    if size > MAX_FILE_BYTES:
        raise FileRejected("OVERSIZE", f"{path.name}: {size} bytes exceeds the {MAX_FILE_BYTES} byte limit")
    return size


def _read_bytes(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as err:
        raise FileRejected("UNREADABLE", f"{path.name}: cannot be read ({err.strerror})") from None


def _utf8_valid(path: Path, skip: int) -> bool:
    """True when the file from byte ``skip`` on is valid UTF-8; reads block by block."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    try:
        with path.open("rb") as handle:
            handle.seek(skip)
            while block := handle.read(_BLOCK_BYTES):
                if block.isascii() and not decoder.getstate()[0]:
                    continue
                decoder.decode(block)
            decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        return False
    except OSError as err:
        raise FileRejected("UNREADABLE", f"{path.name}: cannot be read ({err.strerror})") from None
    return True


def _only_whitespace(path: Path, skip: int) -> bool:
    try:
        with path.open("rb") as handle:
            handle.seek(skip)
            while block := handle.read(_BLOCK_BYTES):
                if block.strip():
                    return False
    except OSError as err:
        raise FileRejected("UNREADABLE", f"{path.name}: cannot be read ({err.strerror})") from None
    return True


def _last_byte(path: Path) -> bytes:
    try:
        with path.open("rb") as handle:
            handle.seek(-1, io.SEEK_END)
            return handle.read(1)
    except OSError as err:
        raise FileRejected("UNREADABLE", f"{path.name}: cannot be read ({err.strerror})") from None


@dataclass
class ExportReader:
    """A CSV export whose whole-file checks passed; hands out its records in batches.

    ``source`` is what polars reads: the file itself when it is UTF-8, else the text
    re-encoded to UTF-8 in memory.
    """

    path: Path
    profile: Profile
    header: list[str]
    notes: list[str]
    source: Path | bytes
    ends_with_newline: bool
    skip: int = 0  # bytes before the text (a UTF-8 byte order mark)

    def batches(self, batch_rows: int | None = None) -> Iterator[RawExport]:
        """Records in batches of at most ``batch_rows`` (default BATCH_ROWS), numbered
        across the whole file.

        A structural fault anywhere (a ragged record, an unbalanced quote) switches to
        splitting record by record so each malformed record can be named; that batch has
        ``restart`` set and holds every record of the file.
        """
        restart = False
        if self.ends_with_newline:
            yielded = False
            try:
                number = 0
                for frame in self._scan().collect_batches(chunk_size=batch_rows or BATCH_ROWS):
                    cells = _number_records(frame, self.header, number)
                    number += cells.height
                    yield RawExport(path=self.path, cells=cells, header=self.header, notes=self.notes)
                    yielded = True
                if not yielded:
                    empty = _empty_cells(self.header)
                    yield RawExport(path=self.path, cells=empty, header=self.header, notes=self.notes)
                return
            except pl.exceptions.PolarsError:
                restart = yielded  # structural fault somewhere: split record by record to name it
        yield self._split_slowly(restart)

    def read_all(self) -> RawExport:
        """Every record in one frame."""
        parts: list[RawExport] = []
        for batch in self.batches():
            if batch.restart:
                parts = []
            parts.append(batch)
        if len(parts) == 1:
            return replace(parts[0], restart=False)
        cells = pl.concat([p.cells for p in parts])
        return RawExport(path=self.path, cells=cells, header=self.header, notes=self.notes)

    def _scan(self) -> pl.LazyFrame:
        return pl.scan_csv(
            self.source,
            has_header=True,
            new_columns=self.header,
            separator=self.profile.delimiter,
            quote_char=self.profile.quote_char or None,
            infer_schema=False,
            empty_string_is_null=False,
            raise_if_empty=False,
            truncate_ragged_lines=False,
        )

    def _split_slowly(self, restart: bool) -> RawExport:
        if isinstance(self.source, Path):
            text = _read_bytes(self.source)[self.skip :].decode("utf-8")
        else:
            text = self.source.decode("utf-8")
        rows, numbers, malformed = _slow_split(text, self.header, self.profile)
        cells = pl.DataFrame(
            {name: [r[i] for r in rows] for i, name in enumerate(self.header)},
            schema={name: pl.String for name in self.header},
        ).with_columns(pl.Series(ROW, numbers, dtype=pl.Int64))
        return RawExport(
            path=self.path,
            cells=cells.select([ROW, *self.header]),
            header=self.header,
            malformed=malformed,
            notes=self.notes,
            restart=restart,
        )


def _empty_cells(header: list[str]) -> pl.DataFrame:
    return pl.DataFrame(schema={ROW: pl.Int64, **{name: pl.String for name in header}})


def _number_records(frame: pl.DataFrame, header: list[str], before: int) -> pl.DataFrame:
    """Drop blank rows (not records) and number the rest, continuing after ``before``."""
    first = pl.col(header[0])
    if frame.select((first.is_null() | (first.str.strip_chars() == "")).any()).item():
        blank = pl.all_horizontal(pl.col(header).fill_null("").str.strip_chars() == "")
        frame = frame.filter(~blank)
    numbered = frame.with_row_index(ROW, offset=before + 1).with_columns(pl.col(ROW).cast(pl.Int64))
    return numbered.select([ROW, *header])


def open_export(path: Path, profile: Profile) -> ExportReader | ParquetExport:
    """Check one file under its profile and get it ready to read. Raises FileRejected for
    whole-file faults (empty, wrong encoding, wrong delimiter, duplicated columns)."""
    if profile.feed is not None:
        # FHIR and HL7 v2 feeds: grouped into rows of text cells (imported here: feeds use this module)
        from pipeline.ingest.feeds.reader import open_feed

        return open_feed(path, profile)
    size = _stat_size(path)
    if profile.format == "parquet":
        return ParquetExport(path, _parquet_header(path))
    try:
        with path.open("rb") as handle:
            head = handle.read(_HEAD_BYTES)
    except OSError as err:
        raise FileRejected("UNREADABLE", f"{path.name}: cannot be read ({err.strerror})") from None
    notes: list[str] = []
    skip = 0
    if head.startswith(BOM):
        head = head[len(BOM) :]
        skip = len(BOM)
        notes.append("BOM_STRIPPED")
    if not head.strip() and (size <= skip + len(head) or _only_whitespace(path, skip)):
        raise FileRejected("EMPTY_FILE", f"{path.name}: file holds only whitespace")
    source: Path | bytes = path
    if profile.encoding == "utf-8":
        if b"\x00" in head or not _utf8_valid(path, skip):
            _decode(path, _read_bytes(path)[skip:], profile)  # raises with the line of the fault
        ends_with_newline = _last_byte(path) in (b"\n", b"\r")
        head_text = head[:65536].decode("utf-8", errors="replace")
    else:
        data = _read_bytes(path)[skip:]
        text, decode_notes = _decode(path, data, profile)
        assert text is not None
        notes += decode_notes
        source = text.encode("utf-8")
        ends_with_newline = source.endswith((b"\n", b"\r"))
        head_text = text[:65536]
        skip = 0
    header = _header(path, head_text, profile)
    if len(header) == 1 and profile.delimiter not in head_text.split("\n", 1)[0]:
        others = [d for d in (",", ";", "\t", "|") if d != profile.delimiter and d in header[0]]
        hint = f" but the header contains {others[0]!r}" if others else ""
        raise FileRejected(
            "DIALECT_MISMATCH",
            f"{path.name}: header has a single column: the profile declares delimiter {profile.delimiter!r}{hint}",
        )
    return ExportReader(
        path=path,
        profile=profile,
        header=header,
        notes=notes,
        source=source,
        ends_with_newline=ends_with_newline,
        skip=skip,
    )


@dataclass
class ParquetExport:
    """A Parquet export (typed columns), handed out in batches like a CSV export. Only the
    schema is read when the file is opened; the rows when they are asked for."""

    path: Path
    header: list[str]
    notes: list[str] = field(default_factory=list)

    def batches(self, batch_rows: int | None = None) -> Iterator[RawExport]:
        raw = self.read_all()
        size = batch_rows or BATCH_ROWS
        cells = raw.cells
        if cells.height <= size:
            yield raw
            return
        for start in range(0, cells.height, size):
            yield replace(raw, cells=cells.slice(start, size))

    def read_all(self) -> RawExport:
        return _read_parquet(self.path)

    def read_rows(self, rows: list[int]) -> pl.DataFrame:
        """The cells of the given records (1-based numbers), as ``read_all`` would give them."""
        try:
            frame = pl.scan_parquet(self.path).with_row_index(ROW, offset=1)
            picked = frame.filter(pl.col(ROW).is_in(rows)).collect()
        except Exception as err:
            raise FileRejected(
                "PARQUET_CORRUPT", f"{self.path.name}: not a readable Parquet file ({type(err).__name__})"
            ) from None
        return picked.with_columns(pl.col(ROW).cast(pl.Int64))


def read_export(path: Path, profile: Profile) -> RawExport:
    """Read one whole file under its profile. Raises FileRejected for whole-file faults."""
    return open_export(path, profile).read_all()


def _parquet_header(path: Path) -> list[str]:
    """The column names of a Parquet export, from its footer; FileRejected when it cannot be
    read or two names differ only by case."""
    try:
        header = list(pl.read_parquet_schema(path))
    except Exception as err:
        detail = type(err).__name__
        raise FileRejected("PARQUET_CORRUPT", f"{path.name}: not a readable Parquet file ({detail})") from None
    folded = [h.casefold() for h in header]
    dupes = sorted({h for h, f in zip(header, folded, strict=True) if folded.count(f) > 1})
    if dupes:
        raise FileRejected("DUPLICATE_COLUMN", f"{path.name}: columns differ only by case: {', '.join(dupes)}")
    return header


def _read_parquet(path: Path) -> RawExport:
    header = _parquet_header(path)
    try:
        frame = pl.read_parquet(path)
    except Exception as err:
        detail = type(err).__name__
        raise FileRejected("PARQUET_CORRUPT", f"{path.name}: not a readable Parquet file ({detail})") from None
    cells = frame.with_row_index(ROW, offset=1).with_columns(pl.col(ROW).cast(pl.Int64))
    return RawExport(path=path, cells=cells, header=header)
