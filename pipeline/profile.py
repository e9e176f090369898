"""Mapping profiles: how one export source lays out its blood gas results.

A profile is a TOML file. It declares the dialect (delimiter, quote, decimal mark,
encoding), the date-time format and time zone, which source column holds each canonical
field, the unit of each measured column (fixed, or read per row from a unit column), and
code maps for the code fields (sample type, oxygen device, collection method). Nothing is
guessed: ingestion checks the file against the profile and rejects the file when they
disagree. See DEVELOPERS.md, "Adding a site profile".

``[profile] kind`` says which record the export holds: ``samples`` (blood gas results, the
default) or ``prescriptions`` (the oxygen prescriptions feed); the profile maps that kind's
canonical fields (``pipeline.schema.RECORD_SPECS``).

Every column named in ``[columns]`` must be in each file: a file without one is rejected
(``MISSING_COLUMN``), because a column that silently disappears would load every record
with that value empty. ``[profile] optional_columns`` lists the source headers (as written
in ``[columns]``) an export may leave out; a required field's column cannot be optional.
"""

from __future__ import annotations

import hashlib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pipeline.errors import ConfigError
from pipeline.ingest.feeds import FEED_FORMATS, FHIR_NDJSON
from pipeline.ingest.feeds.mapping import FeedMapping, read_feed_mapping
from pipeline.schema import CODE_LISTS, RECORD_SPECS, UNIT_CHOICES, RecordSpec

ENCODINGS = ("utf-8", "latin-1", "cp1252")
FORMATS = ("csv", "parquet", *FEED_FORMATS)


@dataclass(frozen=True)
class Profile:
    name: str
    path: Path
    format: str = "csv"
    delimiter: str = ","
    quote_char: str = '"'
    decimal_mark: str = "."
    encoding: str = "utf-8"
    datetime_format: str = "%Y-%m-%d %H:%M:%S"
    date_format: str = "%Y-%m-%d"
    timezone: str = "UTC"
    columns: dict[str, str] = field(default_factory=dict)
    units: dict[str, str] = field(default_factory=dict)
    unit_columns: dict[str, str] = field(default_factory=dict)
    codes: dict[str, dict[str, str]] = field(default_factory=dict)  # field -> source code (casefolded) -> canonical
    kind: str = "samples"
    true_values: tuple[str, ...] = ("1", "y", "yes", "true", "t")
    false_values: tuple[str, ...] = ("0", "n", "no", "false", "f")
    missing_values: tuple[str, ...] = ("", "-", "--", "n/a", "na", "null", "none")
    # SHA-256 of the profile file's bytes, kept with every file it loads
    # (ingested_files.profile_sha256): a store can tell which files an older version of
    # the profile read.
    sha256: str = ""
    # Source headers of [columns] that a file may lack (stored casefolded and stripped, as
    # headers are matched); any other mapped column missing rejects the file.
    optional_columns: frozenset[str] = frozenset()
    # FHIR and HL7 v2 feeds: the observation codes and the rest of the feed keys
    # (pipeline/ingest/feeds/mapping.py); None for CSV and Parquet.
    feed: FeedMapping | None = None

    @property
    def record(self) -> RecordSpec:
        """The kind of record this export holds: its fields, key and store tables."""
        return RECORD_SPECS[self.kind]

    @property
    def sample_type_codes(self) -> dict[str, str]:
        return self.codes.get("sample_type", {})

    @property
    def device_codes(self) -> dict[str, str]:
        return self.codes.get("o2_device", {})

    def unit_of(self, canonical: str) -> str:
        """The declared unit of a canonical numeric field (its canonical unit by default)."""
        spec = self.record.fields_by_name[canonical]
        return self.units.get(canonical, spec.canonical_unit or "")

    def is_optional(self, source: str) -> bool:
        """True when the profile lets a file lack this source column."""
        return source.strip().casefold() in self.optional_columns

    @property
    def source_columns(self) -> list[str]:
        return list(self.columns.values()) + list(self.unit_columns.values())


def _table(raw: dict, key: str, path: Path) -> dict:
    value = raw.get(key, {})
    if not isinstance(value, dict):
        raise ConfigError(f"{path}: [{key}] must be a table")
    return value


def load_profile(path: Path | str) -> Profile:
    """Read and check a mapping profile; every mistake is reported as a ConfigError."""
    path = Path(path)
    try:
        data = path.read_bytes()
        raw = tomllib.loads(data.decode("utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"{path}: mapping profile not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise ConfigError(f"{path}: not a valid TOML profile ({err})") from None

    head = _table(raw, "profile", path)
    columns = {str(k): str(v) for k, v in _table(raw, "columns", path).items()}
    units = {str(k): str(v) for k, v in _table(raw, "units", path).items()}
    unit_columns = {str(k): str(v) for k, v in _table(raw, "unit_columns", path).items()}
    kind = str(head.get("kind", "samples"))
    fmt = str(head.get("format", "csv"))
    feed: FeedMapping | None = None
    feed_problems: list[str] = []
    if fmt in FEED_FORMATS:
        # A feed's reader lays records out under canonical names: its columns come from the
        # codes it maps, and its times reach the loader as UTC text (feeds/timestamps.py).
        code_tables = set(_table(raw, "codes", path))
        source_zone = str(head.get("timezone", "UTC"))
        feed, columns, unit_headers = read_feed_mapping(raw, fmt, source_zone, code_tables, feed_problems)
        unit_columns = dict(unit_headers)
        units = {}
    if kind not in RECORD_SPECS:
        raise ConfigError(f"{path}: [profile] kind = {kind!r}; expected one of {', '.join(RECORD_SPECS)}")
    record = RECORD_SPECS[kind]
    fields_by_name = record.fields_by_name
    codes_raw = _table(raw, "codes", path)
    codes: dict[str, dict[str, str]] = {}
    problems: list[str] = list(feed_problems)
    for code_list, table in codes_raw.items():
        if not isinstance(table, dict):
            raise ConfigError(f"{path}: [codes.{code_list}] must be a table")
        if code_list not in record.code_fields:
            problems.append(
                f"[codes.{code_list}] is not a code list of {kind} records; known: {', '.join(record.code_fields)}"
            )
            continue
        codes[code_list] = {str(k).strip().casefold(): str(v) for k, v in table.items()}
        allowed = CODE_LISTS[code_list]
        bad = sorted({v for v in codes[code_list].values() if v not in allowed})
        if bad:
            noun = {"sample_type": "types", "o2_device": "devices"}.get(code_list, "codes")
            problems.append(f"[codes.{code_list}] maps to unknown {noun} {bad}; allowed {list(allowed)}")

    unknown = sorted(set(columns) - set(fields_by_name))
    if unknown:
        problems.append(f"[columns] names unknown canonical fields of {kind} records: {', '.join(unknown)}")
    missing = [f for f in record.required if f not in columns]
    if missing:
        problems.append(f"[columns] must map the required fields: {', '.join(missing)}")
    sources = list(columns.values()) + list(unit_columns.values())
    folded = [s.casefold() for s in sources]
    dupes = sorted({s for s in sources if folded.count(s.casefold()) > 1})
    if dupes:
        problems.append(f"source columns used twice: {', '.join(dupes)}")
    for name, unit in {**units, **{k: "" for k in unit_columns}}.items():
        spec = fields_by_name.get(name)
        if spec is None or spec.unit_family is None:
            problems.append(f"[units]/[unit_columns] name a field without units: {name}")
        elif unit and unit not in UNIT_CHOICES[spec.unit_family]:
            choices = ", ".join(UNIT_CHOICES[spec.unit_family])
            problems.append(f"[units] {name} = {unit!r}; expected one of {choices}")

    if fmt not in FORMATS:
        problems.append(f"format = {fmt!r}; expected one of {FORMATS}")
    encoding = str(head.get("encoding", "utf-8")).lower().replace("_", "-")
    if encoding in ("utf8", "utf-8-sig"):
        encoding = "utf-8"
    if encoding in ("latin1", "iso-8859-1"):
        encoding = "latin-1"
    if encoding not in ENCODINGS:
        problems.append(f"encoding = {encoding!r}; expected one of {ENCODINGS}")
    if fmt == FHIR_NDJSON and encoding != "utf-8":
        problems.append("FHIR JSON is UTF-8 (FHIR R4 JSON representation, json.html); encoding must be utf-8")
    delimiter = str(head.get("delimiter", ","))
    if delimiter == "\\t":
        delimiter = "\t"
    if len(delimiter) != 1:
        problems.append(f"delimiter must be one character, got {delimiter!r}")
    decimal_mark = str(head.get("decimal_mark", "."))
    if decimal_mark not in (".", ","):
        problems.append(f"decimal_mark must be '.' or ',', got {decimal_mark!r}")
    if decimal_mark == delimiter:
        problems.append("decimal_mark and delimiter cannot be the same character")
    timezone = str(head.get("timezone", "UTC"))
    try:
        ZoneInfo(timezone)
    except (ZoneInfoNotFoundError, ValueError):
        problems.append(f"timezone {timezone!r} is not an IANA time zone name (e.g. Europe/Berlin)")
    optional = head.get("optional_columns", [])
    optional_folded: set[str] = set()
    if not isinstance(optional, list) or not all(isinstance(o, str) for o in optional):
        problems.append('optional_columns must be a list of source headers, e.g. ["SpO2 (%)"]')
    else:
        mapped_by_fold = {source.strip().casefold(): name for name, source in columns.items()}
        for source in optional:
            folded_source = source.strip().casefold()
            name = mapped_by_fold.get(folded_source)
            if name is None:
                problems.append(f"optional_columns names {source!r}, which is not a source column in [columns]")
            elif name in record.required:
                problems.append(f"optional_columns names {source!r}, the column of the required field {name}")
            else:
                optional_folded.add(folded_source)
    for name in columns:
        if name in record.code_fields and not codes.get(name):
            problems.append(f"[codes.{name}] is needed because {name} is mapped")
    if problems:
        raise ConfigError(f"{path}: " + "; ".join(problems))
    if feed is not None:
        # No CSV dialect applies to a feed's cells (an empty quote character also keeps the
        # loader from reading the file as CSV itself); times are UTC text.
        head = {**head, "quote_char": "", "datetime_format": "%Y-%m-%d %H:%M:%S", "date_format": "%Y-%m-%d"}
        timezone = "UTC"

    return Profile(
        name=str(head.get("name", path.stem)),
        path=path,
        format=fmt,
        delimiter=delimiter,
        quote_char=str(head.get("quote_char", '"')),
        decimal_mark=decimal_mark,
        encoding=encoding,
        datetime_format=str(head.get("datetime_format", "%Y-%m-%d %H:%M:%S")),
        date_format=str(head.get("date_format", "%Y-%m-%d")),
        timezone=timezone,
        columns=columns,
        units=units,
        unit_columns=unit_columns,
        codes=codes,
        kind=kind,
        sha256=hashlib.sha256(data).hexdigest(),
        optional_columns=frozenset(optional_folded),
        feed=feed,
    )
