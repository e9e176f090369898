"""A feed file handed to the loader like a CSV export: text cells, one row per record.

``open_feed`` does the whole-file checks a CSV export gets (readable, not empty, text in
the declared encoding); ``FeedExport.batches`` reads the file once with its format's reader,
groups its observations and yields the rows. The class is an ``ExportReader`` so the loader
stages its cells through the same SQL parse as a CSV file's (pipeline/ingest/load.py,
``_stage_cells_of_reader``).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, replace
from pathlib import Path

from pipeline.errors import FileRejected
from pipeline.ingest.feeds import FHIR_NDJSON
from pipeline.ingest.feeds.fhir import FhirReader
from pipeline.ingest.feeds.grouping import Grouper
from pipeline.ingest.feeds.hl7v2 import Hl7Reader
from pipeline.ingest.feeds.hl7v2 import resolve as resolve_hl7
from pipeline.ingest.read import BATCH_ROWS, BOM, ExportReader, RawExport, _decode, _read_bytes, _stat_size
from pipeline.profile import Profile


@dataclass
class FeedExport(ExportReader):
    """A FHIR or HL7 v2 file whose whole-file checks passed."""

    text: str = ""
    _rows: RawExport | None = None

    def read_all(self) -> RawExport:
        if self._rows is None:
            mapping = self.profile.feed
            assert mapping is not None
            grouper = Grouper(self.path, mapping)
            if mapping.format == FHIR_NDJSON:
                fhir = FhirReader(mapping, grouper)
                notes = fhir.read(self.text)
                self._rows = grouper.export([*self.notes, *notes], resolve=fhir.resolve)
            else:
                notes = Hl7Reader(mapping, grouper).read(self.text)
                self._rows = grouper.export([*self.notes, *notes], resolve=resolve_hl7)
            self.notes = self._rows.notes
            self.text = ""  # read once; the rows are kept for a second pass (unit hints)
        return self._rows

    def batches(self, batch_rows: int | None = None) -> Iterator[RawExport]:
        rows = self.read_all()
        size = batch_rows or BATCH_ROWS
        if rows.cells.height <= size:
            yield rows
            return
        for start in range(0, rows.cells.height, size):
            # the faults of lines and messages travel with the first batch
            yield replace(rows, cells=rows.cells.slice(start, size), malformed=rows.malformed if start == 0 else [])


def open_feed(path: Path, profile: Profile) -> FeedExport:
    """Check a feed file as a whole (FileRejected: unreadable, empty, not in its encoding)."""
    _stat_size(path)
    data = _read_bytes(path)
    notes: list[str] = []
    if data.startswith(BOM):
        data = data[len(BOM) :]
        notes.append("BOM_STRIPPED")
    if not data.strip(b" \t\r\n\x0b\x1c"):
        raise FileRejected("EMPTY_FILE", f"{path.name}: file holds no resources or messages")
    decoded, decode_notes = _decode(path, data, profile)
    text = decoded if decoded is not None else data.decode("utf-8")
    assert profile.feed is not None
    return FeedExport(
        path=path,
        profile=profile,
        header=list(profile.feed.fields),
        notes=notes + decode_notes,
        source=path,
        ends_with_newline=True,
        text=text,
    )
