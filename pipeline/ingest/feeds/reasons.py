"""Quarantine reasons of the standard feeds, with what each means (docs/standard-feeds.md).

The loader's own row reasons apply to a feed's records as to a CSV row (NOT_A_NUMBER,
IMPLAUSIBLE, DATE_UNPARSEABLE, MISSING_REQUIRED, UNKNOWN_CODE, UNIT_UNKNOWN, DST_...); these
are the faults only a feed can have: of one line or message, or of one record's group of
observations.
"""

from __future__ import annotations

FEED_REASONS: dict[str, str] = {
    "JSON_INVALID": "a line of a FHIR NDJSON file is not one JSON object (broken or cut-off line)",
    "FHIR_INVALID": "a FHIR resource the R4 resource model rejects, or one without what the reader needs",
    "MESSAGE_TRUNCATED": "an HL7 v2 message that ends early (an MLLP block never closed, or a segment cut off)",
    "SEGMENT_MISSING": "an HL7 v2 message without a segment it needs (MSH first, PID, OBR before its OBX)",
    "MESSAGE_TYPE_UNSUPPORTED": "an HL7 v2 message that is not an observation result (ORU^R01)",
    "ACCESSION_MISSING": "an observation without the specimen or accession that groups it into a record",
    "UNKNOWN_OBSERVATION_CODE": "a record holds an observation code the profile neither maps nor ignores",
    "CONFLICTING_VALUES": "one record holds two different final values for one field",
    "PRELIMINARY_RESULT": "a record whose results are not all final yet: held back until the final result arrives",
    "RESULT_WITHDRAWN": (
        "a record whose every result was entered in error or cancelled; nothing already loaded is removed"
    ),
}
# The loader's reason for a unit outside a field's units, shared with per-row unit columns.
UNIT_UNKNOWN = "UNIT_UNKNOWN"
