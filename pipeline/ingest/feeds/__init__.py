"""Standard result feeds: FHIR R4 Observation exports and HL7 v2 ORU^R01 result messages.

Both carry one observation per analyte, identified by LOINC code; the canonical record is
one sample. A feed reader (``reader.FeedExport``) reads the file with a standard library
(``fhir.resources`` models, ``hl7`` for v2 messages), groups the observations of each
specimen or accession into one record (``grouping``) and hands the loader the same kind of
text cells a CSV export gives: a header of canonical field names, one row per record, the
unit of each value per row. Everything after (parsing, units, hard limits, pseudonyms,
duplicates, corrections, quarantine, reconciliation, the batch contract) is the CSV path.
A group that cannot become one record (conflicting values, an unknown code or unit, a
result still preliminary, one withdrawn) and an input the reader cannot use (a broken JSON
line, a truncated message, a missing segment) become quarantine rows with their own reason
codes (``reasons.FEED_REASONS``), each naming the file and the line or message.
"""

from __future__ import annotations

FHIR_NDJSON = "fhir_ndjson"
HL7V2 = "hl7v2"
FEED_FORMATS: tuple[str, ...] = (FHIR_NDJSON, HL7V2)
