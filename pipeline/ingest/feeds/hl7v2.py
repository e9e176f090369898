"""HL7 v2 result messages (ORU^R01) as observations for the grouping.

A file holds messages one after another, each starting with MSH; MLLP framing characters
(start block 0x0B, end block 0x1C then CR, the Minimal Lower Layer Protocol; the same bytes
as ``hl7.mllp`` START_BLOCK and END_BLOCK) are tolerated and stripped, and segments may end
with CR (the standard's separator, chapter 2 message construction rules) or with LF / CRLF
(files copied between systems). The PATIENT group (PID) is optional in ORU^R01, but a blood
gas without its patient cannot be audited, so a message without PID is quarantined.
Messages are split and parsed by the ``hl7`` package (``hl7.split_file``, ``hl7.parse``).

What each field comes from (HL7 v2.5.1 chapter 7, section 7.3.1 ORU^R01 and the segment
definitions in chapter 3 (PID, PV1) and 7 (OBR, OBX, SPM)):

==================  ==============================================================
sample_id           OBR-3 filler order number (``group_by = "OBR-2"``: placer order number)
patient_id          PID-3 first identifier (CX.1)
birth_date          PID-7
unit, encounter_id  PV1-3 point of care (PL.1), PV1-19 visit number (CX.1)
collected_at        OBR-7 observation date/time (specimen collection)
resulted_at         OBR-22 results report/status change (the latest of the order's)
operator_id         OBR-10 collector identifier (XCN.1)
sample_type         SPM-4 specimen type (CWE.1), else OBR-15 specimen source (first
                    component); else the LOINC system axis ([loinc_sample_type])
collection_method   SPM-7 specimen collection method (CWE.1)
analyser_id         OBX-18 equipment instance identifier (EI.1)
analytes            OBX-3 (CWE.1 code, CWE.3 coding system: ``LN`` LOINC, or the profile's
                    local system), OBX-5 value (SN: comparator and number), OBX-6 units
                    (CWE.1, UCUM)
status              OBX-11 (table 0085): F, C, U a result; P, R, S, I, O held back;
                    D, W, X, N withdrawn (deleted, wrong, cannot be obtained, not asked)
==================  ==============================================================
"""

from __future__ import annotations

import hl7
from hl7.exceptions import HL7Exception

from pipeline.ingest.feeds.grouping import FINAL, HELD, WITHDRAWN, Fault, Grouper, Observation
from pipeline.ingest.feeds.mapping import LOCAL, LOINC, FeedMapping
from pipeline.ingest.feeds.timestamps import TimeProblem, hl7_to_utc

LOINC_CODING_SYSTEM = "LN"  # HL7 table 0396
MESSAGE_KEY = "\x1f"  # joins an accession and its message number into the group key
MLLP_START, MLLP_END = "\x0b", "\x1c"  # hl7.mllp.streams START_BLOCK, END_BLOCK
STATUS_CLASS = {
    "F": FINAL,
    "C": FINAL,
    "U": FINAL,
    "P": HELD,
    "R": HELD,
    "S": HELD,
    "I": HELD,
    "O": HELD,
    "D": WITHDRAWN,
    "W": WITHDRAWN,
    "X": WITHDRAWN,
    "N": WITHDRAWN,
}


def _messages(text: str) -> tuple[list[tuple[str, str]], list[tuple[str, str, str]]]:
    """(where, message text) of every message and (where, reason, detail) of every frame
    that holds none (an MLLP block never closed, text before the first MSH)."""
    faults: list[tuple[str, str, str]] = []
    blocks: list[str] = []
    if MLLP_START in text or MLLP_END in text:
        parts = text.split(MLLP_START)
        if parts[0].strip(" \r\n\x1c"):
            faults.append(("before the first MLLP block", "SEGMENT_MISSING", "text outside an MLLP block"))
        for number, part in enumerate(parts[1:], start=1):
            if MLLP_END not in part:
                faults.append((f"MLLP block {number}", "MESSAGE_TRUNCATED", "MLLP block without its end character"))
                continue
            blocks.append(part.split(MLLP_END, 1)[0])
    else:
        blocks.append(text)
    messages: list[tuple[str, str]] = []
    number = 0
    for block in blocks:
        block = block.replace("\r\n", "\r").replace("\n", "\r").lstrip("\r ")
        if not block.startswith(("MSH", "FHS", "BHS")):
            # segments before any header belong to no message: one quarantine row for them, and
            # only the text from the first MSH on goes to hl7.split_file (which would log them)
            faults.append((f"message {number + 1}", "SEGMENT_MISSING", "segments before the first MSH"))
            first = block.find("\rMSH")
            block = block[first + 1 :] if first >= 0 else ""
        if not block.strip():
            continue
        for message in hl7.split_file(block):
            number += 1
            messages.append((f"message {number}", message))
    return messages, faults


def _text(
    message: hl7.Message, segment: hl7.Segment, field: int, component: int = 1, repetition: int = 1
) -> str | None:
    """One component of one field as text, None when absent or empty (the ``hl7`` accessor
    follows the first child where the tree is deeper, HL7 v2 "compatibility rules"); escape
    sequences (\\F\\, \\S\\, ... HL7 v2.5.1 chapter 2, escape sequences in text fields) are resolved by ``hl7``."""
    try:
        value = segment.extract_field(1, field, repetition, component, 1)
    except (IndexError, KeyError, HL7Exception):
        return None
    if value in (None, ""):
        return None
    text = str(value)
    return message.unescape(text) if "\\" in text else text


def _has(segment: hl7.Segment, field: int) -> bool:
    return len(segment) > field and str(segment[field]) != ""


def _value(message: hl7.Message, obx: hl7.Segment) -> tuple[str | None, bool]:
    """OBX-5 as text and whether it is a number (NM, SN); SN keeps its comparator."""
    kind = _text(message, obx, 2)
    if kind == "SN":
        comparator = _text(message, obx, 5, 1) or ""
        number = _text(message, obx, 5, 2)
        return (f"{comparator}{number}" if number is not None else None), True
    return _text(message, obx, 5), kind == "NM"


def resolve(key: str, attributes: dict[str, str | None]) -> tuple[str, dict[str, str | None], set[str]]:
    """The accession of a group key (accession and message number)."""
    return key.split(MESSAGE_KEY, 1)[0], attributes, set()


class Hl7Reader:
    """Reads one file's messages into a Grouper: one group per order (OBR) of each message."""

    def __init__(self, mapping: FeedMapping, grouper: Grouper) -> None:
        self.mapping = mapping
        self.grouper = grouper
        self.order = 0
        self.message: hl7.Message = hl7.parse("MSH|^~\\&|\r")

    def read(self, text: str) -> list[str]:
        messages, faults = _messages(text)
        for where, reason, detail in faults:
            self.order += 1
            self.grouper.fault(Fault(self.order, reason, where, detail))
        for where, message in messages:
            self.order += 1
            self._message(where, message)
        return []

    def _fault(self, reason: str, where: str, detail: str, original: str, accession: str | None = None) -> None:
        self.grouper.fault(Fault(self.order, reason, where, detail, original, accession))

    def _message(self, where: str, text: str) -> None:
        try:
            message = hl7.parse(text)
            msh = message.segment("MSH")
            self.message = message  # its separators and escape character read its fields
        except (HL7Exception, KeyError, IndexError, ValueError):
            self._fault("SEGMENT_MISSING", where, "no readable MSH segment", text)
            return
        control = _text(self.message, msh, 10)
        if control:
            where = f"{where} (MSH-10 {control})"
        if (_text(self.message, msh, 9, 1), _text(self.message, msh, 9, 2)) != ("ORU", "R01"):
            self._fault("MESSAGE_TYPE_UNSUPPORTED", where, "not an ORU^R01 message", text)
            return
        segments = list(message)
        last = segments[-1]
        names = [str(s[0]) for s in segments]
        if last is not msh and not self._complete(last):
            self._fault("MESSAGE_TRUNCATED", where, f"the last segment ({names[-1]}) is cut off", text)
            return
        if "PID" not in names:
            self._fault("SEGMENT_MISSING", where, "no PID segment", text)
            return
        if "OBX" in names and ("OBR" not in names or names.index("OBX") < names.index("OBR")):
            self._fault("SEGMENT_MISSING", where, "OBX before any OBR segment", text)
            return
        if "OBR" not in names:
            self._fault("SEGMENT_MISSING", where, "no OBR segment", text)
            return
        patient: dict[str, str | None] = {}
        order_groups: list[list[hl7.Segment]] = []
        order: hl7.Segment | None = None
        for segment in segments:
            name = str(segment[0])
            if name == "PID":
                patient = {
                    "patient_id": _text(self.message, segment, 3),
                    "birth_date": _date(_text(self.message, segment, 7)),
                }
            elif name == "PV1":
                patient |= {"unit": _text(self.message, segment, 3), "encounter_id": _text(self.message, segment, 19)}
            elif name == "ORC":
                order = segment  # the common order segment precedes its OBR (ORU^R01 ORDER_OBSERVATION)
            elif name == "OBR":
                order_groups.append([segment, *([order] if order is not None else [])])
                order = None
            elif order_groups:
                order_groups[-1].append(segment)
        for group in order_groups:
            self._order(where, text, patient, group)

    def _complete(self, segment: hl7.Segment) -> bool:
        """Whether a segment has the fields this reader needs (a cut-off OBX lacks OBX-11)."""
        name = str(segment[0])
        if name == "OBX":
            return _has(segment, 3) and _has(segment, 11)
        if name == "OBR":
            return _has(segment, 7)
        return True

    def _order(self, where: str, text: str, patient: dict[str, str | None], group: list[hl7.Segment]) -> None:
        obr = group[0]
        number = 3 if self.mapping.group_by == "OBR-3" else 2
        # the filler (placer) order number is OBR-3 (OBR-2), and ORC-3 (ORC-2) of the same order
        orc = next((s for s in group[1:2] if str(s[0]) == "ORC"), None)
        accession = _text(self.message, obr, number) or (_text(self.message, orc, number) if orc else None)
        if accession is None:
            self._fault("ACCESSION_MISSING", where, f"{self.mapping.group_by} and ORC-{number} are empty", text)
            return
        zone = self.mapping.source_timezone
        try:
            collected = hl7_to_utc(_text(self.message, obr, 7), zone)
            resulted = hl7_to_utc(_text(self.message, obr, 22), zone)
        except TimeProblem as problem:
            self._fault(problem.reason, where, str(problem), text)
            return
        attributes = {
            **patient,
            "collected_at": collected,
            "resulted_at": resulted,
            "operator_id": _text(self.message, obr, 10),
            "sample_type": _text(self.message, obr, 15),
        }
        for spm in (s for s in group if str(s[0]) == "SPM"):
            attributes["sample_type"] = _text(self.message, spm, 4) or attributes["sample_type"]
            attributes["collection_method"] = _text(self.message, spm, 7)
        for obx in (s for s in group if str(s[0]) == "OBX"):
            # one record per order of each message: a message sent again, or a corrected one
            # later in the file, is a second row of the accession for the loader's own
            # duplicate and correction handling (as a CSV row is)
            self._observation(where, text, f"{accession}{MESSAGE_KEY}{self.order}", attributes, obx)

    def _observation(
        self, where: str, text: str, accession: str, attributes: dict[str, str | None], obx: hl7.Segment
    ) -> None:
        code, system = _text(self.message, obx, 3, 1), _text(self.message, obx, 3, 3)
        set_id = _text(self.message, obx, 1) or "?"
        place = f"{where} OBX {set_id}"
        if not self._complete(obx):
            self._fault("SEGMENT_MISSING", place, "OBX without OBX-3 or OBX-11", text, accession)
            return
        if system == LOINC_CODING_SYSTEM:
            name = self.mapping.by_code.get((LOINC, code or ""))
        elif system == self.mapping.local_code_system:
            name = self.mapping.by_code.get((LOCAL, code or ""))
        else:
            name = None
        if name is None:
            if code in self.mapping.ignored_codes:
                self.grouper.counts["ignored"] += 1
                return
            self._fault(
                "UNKNOWN_OBSERVATION_CODE",
                place,
                f"observation code {code}^{system} is not in the profile",
                text,
                accession,
            )
            return
        status = STATUS_CLASS.get(_text(self.message, obx, 11) or "")
        if status is None:
            self._fault("SEGMENT_MISSING", place, "OBX-11 is not a result status of HL7 table 0085", text, accession)
            return
        value, quantity = _value(self.message, obx)
        self.grouper.add(
            Observation(
                accession=accession,
                where=place,
                order=self.order,
                field=name,
                value=value,
                quantity=quantity,
                ucum=_text(self.message, obx, 6),
                status=status,
                identity=f"{code}|{_text(self.message, obx, 4) or ''}",
                code=code if system == LOINC_CODING_SYSTEM else None,
                attributes={**attributes, "analyser_id": _text(self.message, obx, 18)},
            )
        )


def _date(text: str | None) -> str | None:
    """An HL7 DT / DTM date (YYYYMMDD...) as YYYY-MM-DD; other text as written."""
    if text and len(text) >= 8 and text[:8].isdigit():
        return f"{text[:4]}-{text[4:6]}-{text[6:8]}"
    return text
