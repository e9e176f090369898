"""One record per specimen: observations of a feed grouped by their accession.

The feed readers (fhir.py, hl7v2.py) hand over one ``Observation`` per analyte result and
a ``Fault`` for every line or message they cannot use; ``Grouper`` gathers the observations
of one group (a FHIR accession across the whole file; an HL7 order of one message, so a
message sent again or corrected later in the file is another row for the loader's own
duplicate and correction rules) and decides, per field, which result stands:

- a final, corrected or amended result stands over a preliminary one; between two final
  results of the same observation (the same FHIR Observation.id, or HL7 OBX-3 and OBX-4 of
  the same order), the later in the file stands (a correction sent after its original);
- the same value again is a duplicate observation and is merged;
- a different final value from another observation is a conflict: the record is
  quarantined (``CONFLICTING_VALUES``), no value is picked;
- an entered-in-error or cancelled result retracts the same observation's earlier result;
  a record left with nothing but retracted results is quarantined (``RESULT_WITHDRAWN``);
  nothing already in the store is removed (a later delivery is read the ordinary way);
- a record with a field whose best result is preliminary is held back
  (``PRELIMINARY_RESULT``) until a final one arrives in a later file.

A record's row then holds each field's value as text in the unit it came in, and that
unit, for the loader to parse and convert as it does a CSV row. The counts the grouping
merged, replaced or retracted go to the file's notes.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from pipeline.ingest.feeds.mapping import FeedMapping
from pipeline.ingest.feeds.reasons import FEED_REASONS, UNIT_UNKNOWN
from pipeline.ingest.feeds.ucum import unit_name
from pipeline.ingest.read import ROW, RawExport
from pipeline.schema import FIELDS_BY_NAME

FINAL, HELD, WITHDRAWN = "final", "held", "withdrawn"
# Attributes every observation of one record must agree on (one sample has one patient,
# one collection time...); resulted_at is the latest of its results.
LATEST = frozenset({"resulted_at"})
# Original text kept per quarantined line or message, after where it is and what is wrong.
MAX_ORIGINAL_CHARS = 4000


@dataclass(slots=True)
class Observation:
    """One analyte result as a feed reader found it."""

    accession: str
    where: str  # "line 12", "message 3 (MSH-10 ABC123)": for messages, never a value
    order: int  # place in the file
    field: str
    value: str | None  # as written: "7.41", ">600", "haemolysed"; None when absent
    quantity: bool  # the value is a number with a unit (FHIR valueQuantity, HL7 NM/SN)
    ucum: str | None
    status: str  # FINAL, HELD or WITHDRAWN
    identity: str  # the same observation in another version has the same identity
    code: str | None = None  # its LOINC code, for the sample type of the system axis
    attributes: dict[str, str | None] = field(default_factory=dict)


@dataclass(slots=True)
class Fault:
    """A line or message (or one code in it) that cannot join a record."""

    order: int
    reason: str
    where: str
    detail: str
    original: str = ""
    accession: str | None = None  # an observation with an unknown code still names its record


# (group key, attributes) -> (accession, attributes, fields whose sources disagree)
Resolver = Callable[[str, dict[str, str | None]], tuple[str, dict[str, str | None], set[str]]]


@dataclass(slots=True)
class _Result:
    value: str | None
    quantity: bool
    unit: str | None
    identity: str
    held: bool
    code: str | None


@dataclass
class _Group:
    accession: str
    order: int
    first: str
    last: str
    attributes: dict[str, str | None] = field(default_factory=dict)
    conflicts: set[str] = field(default_factory=set)
    results: dict[str, _Result] = field(default_factory=dict)
    problems: list[tuple[str, str]] = field(default_factory=list)  # (reason, detail)
    withdrawn: int = 0


def _same_value(a: _Result, b: _Result) -> bool:
    if a.unit != b.unit:
        return False
    if a.value == b.value:
        return True
    try:
        return float(a.value or "nan") == float(b.value or "nan")
    except ValueError:
        return False


class Grouper:
    """Gathers the observations and faults of one file; ``export`` lays out the rows."""

    def __init__(self, path: Path, mapping: FeedMapping) -> None:
        self.path = path
        self.mapping = mapping
        self.groups: dict[str, _Group] = {}
        self.faults: list[Fault] = []
        self.counts: Counter[str] = Counter()

    def fault(self, fault: Fault) -> None:
        if fault.accession is not None and fault.accession in self.groups:
            # an unmappable observation of a known record quarantines that record
            self.groups[fault.accession].problems.append((fault.reason, fault.detail))
            return
        if fault.accession is not None:
            group = self._group(fault.accession, fault.order, fault.where)
            group.problems.append((fault.reason, fault.detail))
            return
        self.faults.append(fault)

    def _group(self, accession: str, order: int, where: str) -> _Group:
        group = self.groups.get(accession)
        if group is None:
            group = self.groups[accession] = _Group(accession, order, where, where)
        group.last = where
        return group

    def add(self, obs: Observation) -> None:
        self.counts["observations"] += 1
        group = self._group(obs.accession, obs.order, obs.where)
        self._merge_attributes(group, obs.attributes)
        held = group.results.get(obs.field)
        if obs.status == WITHDRAWN:
            group.withdrawn += 1
            self.counts["withdrawn"] += 1
            if held is not None and held.identity == obs.identity:
                del group.results[obs.field]
                group.conflicts.discard(obs.field)
            return
        unit = None
        family = FIELDS_BY_NAME[obs.field].unit_family
        if family is not None and obs.quantity:
            unit = unit_name(obs.ucum, family)
            if unit is None:
                group.problems.append((UNIT_UNKNOWN, f"{obs.where}: unit {obs.ucum!r} is not a unit of {obs.field}"))
                return
        new = _Result(obs.value, obs.quantity, unit, obs.identity, obs.status == HELD, obs.code)
        if held is None or (held.held and not new.held):
            if held is not None:
                self.counts["replaced"] += 1
            group.results[obs.field] = new
            group.conflicts.discard(obs.field)
        elif new.held and not held.held:
            self.counts["replaced"] += 1  # a preliminary result after the final one: the final stands
        elif held.identity == new.identity:
            if _same_value(held, new):
                self.counts["duplicates"] += 1
            else:
                self.counts["replaced"] += 1
            group.results[obs.field] = new  # a later version of the same observation
        elif _same_value(held, new):
            self.counts["duplicates"] += 1
        else:
            group.conflicts.add(obs.field)

    def _merge_attributes(self, group: _Group, attributes: dict[str, str | None]) -> None:
        for name, value in attributes.items():
            if value is None or value == "":
                continue
            held = group.attributes.get(name)
            if held is None:
                group.attributes[name] = value
            elif name in LATEST:
                group.attributes[name] = max(held, value)
            elif held != value:
                group.conflicts.add(name)

    def _verdict(self, group: _Group) -> tuple[str, str] | None:
        """The quarantine reason and detail of a group that cannot load, or None."""
        if group.conflicts:
            return "CONFLICTING_VALUES", f"different values for {', '.join(sorted(group.conflicts))}"
        if group.problems:
            reason, _detail = group.problems[0]
            details = "; ".join(d for _r, d in group.problems)
            return reason, details
        if not group.results and group.withdrawn:
            return "RESULT_WITHDRAWN", f"{group.withdrawn} result(s) entered in error or cancelled, none left"
        held = sorted(name for name, result in group.results.items() if result.held)
        if held:
            return "PRELIMINARY_RESULT", f"not final yet: {', '.join(held)}"
        return None

    def _sample_type(self, group: _Group) -> tuple[str | None, str | None]:
        """The specimen's own type, else the one the LOINC system axis of its results says."""
        if group.attributes.get("sample_type"):
            return group.attributes["sample_type"], None
        said = {
            self.mapping.sample_type_by_loinc[r.code]
            for r in group.results.values()
            if r.code in self.mapping.sample_type_by_loinc
        }
        if len(said) > 1:
            return None, "sample_type"
        return (said.pop() if said else None), None

    def export(self, notes: list[str], resolve: Resolver | None = None) -> RawExport:
        """The file's rows: one per record or fault, numbered in order of first appearance.

        ``resolve`` (FHIR) turns a group's key and attributes, which may be references to
        other resources of the file, into the accession and the attributes themselves."""
        header = list(self.mapping.fields)
        rows: list[tuple[int, dict[str, str | None] | None, tuple[str, str] | None]] = []
        for fault in self.faults:
            text = f"{fault.where}: {fault.detail}"
            if fault.original:
                text += "\n" + fault.original[:MAX_ORIGINAL_CHARS]
            rows.append((fault.order, None, (fault.reason, text)))
        for group in self.groups.values():
            if resolve is not None:
                group.accession, group.attributes, clashes = resolve(group.accession, group.attributes)
                group.conflicts.update(clashes)
            sample_type, axis_conflict = self._sample_type(group)
            if axis_conflict:
                group.conflicts.add(axis_conflict)
            verdict = self._verdict(group)
            where = group.first if group.first == group.last else f"{group.first} to {group.last}"
            if verdict is not None:
                reason, detail = verdict
                rows.append((group.order, None, (reason, f"{where}, accession {group.accession}: {detail}")))
                continue
            cells: dict[str, str | None] = dict.fromkeys(header)
            cells.update(group.attributes)
            cells["sample_id"] = group.accession
            cells["sample_type"] = sample_type
            for name, result in group.results.items():
                cells[name] = result.value
                if name in self.mapping.unit_headers:
                    cells[self.mapping.unit_headers[name]] = result.unit
            rows.append((group.order, cells, None))
        rows.sort(key=lambda r: r[0])
        numbered = [(number, cells) for number, (_o, cells, _f) in enumerate(rows, start=1) if cells is not None]
        malformed = [(number, f[0], f[1]) for number, (_o, _c, f) in enumerate(rows, start=1) if f is not None]
        columns = {name: [c.get(name) for _n, c in numbered] for name in header}
        frame = pl.DataFrame(
            {ROW: [n for n, _c in numbered], **columns},
            schema={ROW: pl.Int64, **{name: pl.String for name in header}},
        )
        notes = [*notes, *self._notes()]
        return RawExport(path=self.path, cells=frame, header=header, malformed=malformed, notes=notes)

    def _notes(self) -> list[str]:
        c = self.counts
        notes = [f"observations read: {c['observations']}, records: {len(self.groups)}"]
        if c["duplicates"]:
            notes.append(f"duplicate observations merged: {c['duplicates']}")
        if c["replaced"]:
            notes.append(f"results replaced by a later or final version: {c['replaced']}")
        if c["withdrawn"]:
            notes.append(f"results entered in error or cancelled: {c['withdrawn']}")
        if c["ignored"]:
            notes.append(f"observations with ignored codes: {c['ignored']}")
        return notes


assert set(FEED_REASONS) >= {"CONFLICTING_VALUES", "PRELIMINARY_RESULT", "RESULT_WITHDRAWN"}
