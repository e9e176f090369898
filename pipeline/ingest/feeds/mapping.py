"""The feed keys of a mapping profile: which observation code fills which canonical field.

A feed profile (``[profile] format = "fhir_ndjson"`` or ``"hl7v2"``) has no ``[columns]``:
the reader lays each record out under canonical field names, so the profile's columns are
made here from what it maps. Keys (see docs/standard-feeds.md):

- ``[loinc]``: LOINC code -> canonical field (checked by the code's check digit);
- ``[local_codes]`` with ``[profile] local_code_system``: the site's own observation codes
  for fields LOINC has no code for (a charted CO2-retainer flag, say);
- ``[loinc_sample_type]``: LOINC code -> the sample type its system axis says (an export
  code of ``[codes.sample_type]``), used when the record names no specimen type itself;
- ``[profile] ignored_codes``: codes the feed sends that the audit does not load; any other
  code the profile does not map quarantines its record (``UNKNOWN_OBSERVATION_CODE``);
- ``[profile] group_by``: what the record's accession is. HL7 v2: ``"OBR-3"`` (filler order
  number, the default; ORC-3 when OBR-3 is empty) or ``"OBR-2"`` (placer order number).
  FHIR: ``"specimen"`` (Observation.specimen, the default) or ``"identifier"`` (the
  Observation.identifier whose system is ``[profile] accession_system``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from pipeline.ingest.feeds import FEED_FORMATS, FHIR_NDJSON, HL7V2
from pipeline.ingest.feeds.loinc import is_loinc_code
from pipeline.schema import FIELDS_BY_NAME, UNIT_CHOICES, Kind

# Fields a feed fills from the message or resources around the observations, not from an
# observation code (see fhir.py and hl7v2.py for where each comes from).
RECORD_ATTRIBUTES: tuple[str, ...] = (
    "sample_id",
    "patient_id",
    "birth_date",
    "unit",
    "encounter_id",
    "analyser_id",
    "operator_id",
    "collected_at",
    "resulted_at",
    "sample_type",
    "collection_method",
)
UNIT_HEADER = "{} unit"
GROUP_KEYS = {HL7V2: ("OBR-3", "OBR-2"), FHIR_NDJSON: ("specimen", "identifier")}
LOINC = "loinc"
LOCAL = "local"


@dataclass(frozen=True)
class FeedMapping:
    """What a feed profile declares beyond the shared dialect keys."""

    format: str
    by_code: dict[tuple[str, str], str] = field(default_factory=dict)  # (LOINC|LOCAL, code) -> field
    sample_type_by_loinc: dict[str, str] = field(default_factory=dict)
    ignored_codes: frozenset[str] = frozenset()
    local_code_system: str | None = None
    source_timezone: str = "UTC"  # HL7 v2 times without an offset are local times here
    group_by: str = "OBR-3"
    accession_system: str | None = None  # FHIR group_by = "identifier": the identifier's system
    fields: tuple[str, ...] = ()  # the header the reader writes, unit columns included
    unit_headers: dict[str, str] = field(default_factory=dict)  # field -> its per-row unit column


def _str_table(raw: dict, key: str, problems: list[str]) -> dict[str, str]:
    table = raw.get(key, {})
    if not isinstance(table, dict):
        problems.append(f"[{key}] must be a table")
        return {}
    return {str(k).strip(): str(v).strip() for k, v in table.items()}


def read_feed_mapping(
    raw: dict, fmt: str, timezone: str, code_tables: set[str], problems: list[str]
) -> tuple[FeedMapping, dict[str, str], dict[str, str]]:
    """The feed mapping and the ``[columns]`` / ``[unit_columns]`` it implies; mistakes are
    appended to ``problems`` (the profile reports them all at once)."""
    assert fmt in FEED_FORMATS
    head = raw.get("profile", {})
    for table in ("columns", "units", "unit_columns"):
        if raw.get(table):
            problems.append(f"[{table}] does not apply to format {fmt!r}: a feed maps observation codes in [loinc]")
    if str(head.get("kind", "samples")) != "samples":
        problems.append(f"format {fmt!r} holds blood gas samples; kind must be 'samples'")
    loinc = _str_table(raw, "loinc", problems)
    local = _str_table(raw, "local_codes", problems)
    by_sample_type = _str_table(raw, "loinc_sample_type", problems)
    local_system = head.get("local_code_system")
    if local and not local_system:
        problems.append(
            "[local_codes] needs [profile] local_code_system "
            '(a FHIR system URI or the HL7 OBX-3 coding system, e.g. "99SVH")'
        )
    for code in [*loinc, *by_sample_type]:
        if not is_loinc_code(code):
            problems.append(f"{code!r} is not a LOINC code (digits, hyphen, check digit: LOINC Users' Guide 12 C)")
    by_code: dict[tuple[str, str], str] = {}
    for system, table in ((LOINC, loinc), (LOCAL, local)):
        for code, name in table.items():
            spec = FIELDS_BY_NAME.get(name)
            if spec is None:
                problems.append(
                    f"[{'loinc' if system == LOINC else 'local_codes'}] {code} names an unknown field {name!r}"
                )
            elif name in RECORD_ATTRIBUTES:
                problems.append(f"{code} maps to {name}, which the feed reads from the message itself")
            else:
                by_code[(system, code)] = name
    # Two codes for one field (arterial and venous pH, say) are allowed: one record holding
    # both with different values is a conflict, reported by the grouping.
    targets = list(by_code.values())
    ignored = head.get("ignored_codes", [])
    if not isinstance(ignored, list) or not all(isinstance(c, str) for c in ignored):
        problems.append('ignored_codes must be a list of codes, e.g. ["24336-0"]')
        ignored = []
    group_by = str(head.get("group_by", GROUP_KEYS[fmt][0]))
    if group_by not in GROUP_KEYS[fmt]:
        problems.append(f"group_by = {group_by!r}; expected one of {GROUP_KEYS[fmt]} for {fmt}")
    accession_system = head.get("accession_system")
    if group_by == "identifier" and not accession_system:
        problems.append('group_by = "identifier" needs [profile] accession_system (the identifier\'s system URI)')
    attributes = [a for a in RECORD_ATTRIBUTES if FIELDS_BY_NAME[a].kind is not Kind.CODE or a in code_tables]
    if by_sample_type and "sample_type" not in code_tables:
        problems.append("[loinc_sample_type] needs [codes.sample_type] to map the sample types it names")
    observed = list(dict.fromkeys(targets))
    columns = {name: name for name in [*attributes, *observed]}
    unit_headers = {
        name: UNIT_HEADER.format(name)
        for name in observed
        if FIELDS_BY_NAME[name].unit_family and len(UNIT_CHOICES[FIELDS_BY_NAME[name].unit_family or ""]) > 1
    }
    mapping = FeedMapping(
        format=fmt,
        by_code=by_code,
        sample_type_by_loinc=by_sample_type,
        ignored_codes=frozenset(ignored),
        local_code_system=str(local_system) if local_system else None,
        source_timezone=timezone,
        group_by=group_by,
        accession_system=str(accession_system) if accession_system else None,
        fields=(*columns.values(), *unit_headers.values()),
        unit_headers=unit_headers,
    )
    return mapping, columns, unit_headers
