"""Mapping profiles: how one export source lays out its blood gas results.

A profile is a TOML file. It declares the dialect (delimiter, quote, decimal mark,
encoding), the date-time format and time zone, which source column holds each canonical
field, the unit of each measured column (fixed, or read per row from a unit column), and
code maps for sample type and oxygen device. Nothing is guessed: ingestion checks the file
against the profile and rejects the file when they disagree. See DEVELOPERS.md, "Adding a
site profile".
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pipeline.errors import ConfigError
from pipeline.schema import FIELDS_BY_NAME, OXYGEN_DEVICES, REQUIRED_FIELDS, SAMPLE_TYPES, UNIT_CHOICES, Kind

ENCODINGS = ("utf-8", "latin-1", "cp1252")
FORMATS = ("csv", "parquet")


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
    sample_type_codes: dict[str, str] = field(default_factory=dict)
    device_codes: dict[str, str] = field(default_factory=dict)
    true_values: tuple[str, ...] = ("1", "y", "yes", "true", "t")
    false_values: tuple[str, ...] = ("0", "n", "no", "false", "f")
    missing_values: tuple[str, ...] = ("", "-", "--", "n/a", "na", "null", "none")

    def unit_of(self, canonical: str) -> str:
        """The declared unit of a canonical numeric field (its canonical unit by default)."""
        spec = FIELDS_BY_NAME[canonical]
        return self.units.get(canonical, spec.canonical_unit or "")

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
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"{path}: mapping profile not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise ConfigError(f"{path}: not a valid TOML profile ({err})") from None

    head = _table(raw, "profile", path)
    columns = {str(k): str(v) for k, v in _table(raw, "columns", path).items()}
    units = {str(k): str(v) for k, v in _table(raw, "units", path).items()}
    unit_columns = {str(k): str(v) for k, v in _table(raw, "unit_columns", path).items()}
    codes = _table(raw, "codes", path)
    for code_list in ("sample_type", "o2_device"):
        if not isinstance(codes.get(code_list, {}), dict):
            raise ConfigError(f"{path}: [codes.{code_list}] must be a table")
    sample_codes = {str(k).strip().casefold(): str(v) for k, v in codes.get("sample_type", {}).items()}
    device_codes = {str(k).strip().casefold(): str(v) for k, v in codes.get("o2_device", {}).items()}

    problems: list[str] = []
    unknown = sorted(set(columns) - set(FIELDS_BY_NAME))
    if unknown:
        problems.append(f"[columns] names unknown canonical fields: {', '.join(unknown)}")
    missing = [f for f in REQUIRED_FIELDS if f not in columns]
    if missing:
        problems.append(f"[columns] must map the required fields: {', '.join(missing)}")
    sources = list(columns.values()) + list(unit_columns.values())
    folded = [s.casefold() for s in sources]
    dupes = sorted({s for s in sources if folded.count(s.casefold()) > 1})
    if dupes:
        problems.append(f"source columns used twice: {', '.join(dupes)}")
    for name, unit in {**units, **{k: "" for k in unit_columns}}.items():
        spec = FIELDS_BY_NAME.get(name)
        if spec is None or spec.unit_family is None:
            problems.append(f"[units]/[unit_columns] name a field without units: {name}")
        elif unit and unit not in UNIT_CHOICES[spec.unit_family]:
            choices = ", ".join(UNIT_CHOICES[spec.unit_family])
            problems.append(f"[units] {name} = {unit!r}; expected one of {choices}")
    bad_types = sorted({v for v in sample_codes.values() if v not in SAMPLE_TYPES})
    if bad_types:
        problems.append(f"[codes.sample_type] maps to unknown types {bad_types}; allowed {list(SAMPLE_TYPES)}")
    bad_devices = sorted({v for v in device_codes.values() if v not in OXYGEN_DEVICES})
    if bad_devices:
        problems.append(f"[codes.o2_device] maps to unknown devices {bad_devices}; allowed {list(OXYGEN_DEVICES)}")

    fmt = str(head.get("format", "csv"))
    if fmt not in FORMATS:
        problems.append(f"format = {fmt!r}; expected one of {FORMATS}")
    encoding = str(head.get("encoding", "utf-8")).lower().replace("_", "-")
    if encoding in ("utf8", "utf-8-sig"):
        encoding = "utf-8"
    if encoding in ("latin1", "iso-8859-1"):
        encoding = "latin-1"
    if encoding not in ENCODINGS:
        problems.append(f"encoding = {encoding!r}; expected one of {ENCODINGS}")
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
    for name in columns:
        spec = FIELDS_BY_NAME.get(name)
        if spec is not None and spec.kind is Kind.CODE:
            table = sample_codes if name == "sample_type" else device_codes
            if not table:
                problems.append(f"[codes.{name}] is needed because {name} is mapped")
    if problems:
        raise ConfigError(f"{path}: " + "; ".join(problems))

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
        sample_type_codes=sample_codes,
        device_codes=device_codes,
    )
