"""Write two of the demo's sources as standard result feeds: FHIR R4 NDJSON and HL7 v2.

The invented hospital's ward satellite analyser SAT-SANDPIPER-1 reports through an
integration engine that exports FHIR R4 resources (one NDJSON file a day: Patient, Encounter,
Specimen and one Observation per result), and the main laboratory's LAB-GAS-2 through the
laboratory system's HL7 v2.5.1 ORU^R01 messages (one MLLP-framed file a day). Their samples
leave the Parquet and US-style CSV exports for these feeds; every other sample is written as
before (``writers.py``). Faults that live in the export are written the way the feeds carry
them: a duplicate is the same resources or message again in a later file, a correction is
sent first with its first value and again later with status ``corrected`` / OBX-11 ``C``, a
text result is a ``valueString`` / OBX-2 ``ST`` in place of the number.

    OUT/fhir/export_YYYY-MM-DD.ndjson   profiles/demo_fhir.toml
    OUT/hl7v2/export_YYYY-MM-DD.hl7     profiles/demo_hl7v2.toml

Observation codes, code lists and units come from the feed's profile TOML ([loinc],
[local_codes], [loinc_sample_type], [codes.*]); the UCUM symbols of each unit are written
here from UCUM (https://ucum.org/ucum), independently of the pipeline's reader.
"""

from __future__ import annotations

import json
import tomllib
from collections.abc import Iterator
from datetime import date
from pathlib import Path

import polars as pl

from synthetic_data.writers import CONVERTED, DECIMALS, _export_rows, _number_text, export_codes, to_unit

FEED_ANALYSERS: dict[str, str] = {"SAT-SANDPIPER-1": "fhir", "LAB-GAS-2": "hl7v2"}
"""Analyser -> the feed its results travel in (instead of its source's CSV or Parquet export)."""
FEED_PROFILES: dict[str, str] = {"fhir": "demo_fhir.toml", "hl7v2": "demo_hl7v2.toml"}
EXTENSIONS = {"fhir": "ndjson", "hl7v2": "hl7"}
# Local time of each feed's files and times: the integration engine works in UTC, the
# laboratory system in the hospital's own zone (as its US-style CSV export does).
ZONES = {"fhir": "UTC", "hl7v2": "America/Chicago"}
# The unit each feed reports a field in (our unit name), and its UCUM symbol.
FEED_UNITS: dict[str, dict[str, str]] = {
    "fhir": {"fio2": "percent", "temperature_c": "C"},
    "hl7v2": {"fio2": "percent", "temperature_c": "F"},
}
UCUM: dict[str, str] = {
    "mmHg": "mm[Hg]",
    "kPa": "kPa",
    "percent": "%",
    "fraction": "1",
    "C": "Cel",
    "F": "[degF]",
    "g/dL": "g/dL",
    "mmol/L": "mmol/L",
    "L/min": "L/min",
    "cmH2O": "cm[H2O]",
    "years": "a",
    "pH": "[pH]",
}
CANONICAL_UNITS: dict[str, str] = {
    **dict.fromkeys(("paco2_mmhg", "pao2_mmhg", "barometric_pressure_mmhg"), "mmHg"),
    **dict.fromkeys(("sao2_pct", "spo2_pct", "cohb_pct", "methb_pct"), "percent"),
    **dict.fromkeys(
        ("hco3_mmol_l", "base_excess_mmol_l", "na_mmol_l", "k_mmol_l", "cl_mmol_l", "lactate_mmol_l", "glucose_mmol_l"),
        "mmol/L",
    ),
    "fio2": "fraction",
    "temperature_c": "C",
    "hb_g_dl": "g/dL",
    "o2_flow_l_min": "L/min",
    "mean_airway_pressure_cmh2o": "cmH2O",
    "peep_cmh2o": "cmH2O",
    "age_years": "years",
    "ph": "pH",
}
BOOLEANS = ("sao2_is_calculated", "hypercapnic_risk", "o2_prescribed")
CODED = ("o2_device",)
LOINC_SYSTEM = "http://loinc.org"
UCUM_SYSTEM = "http://unitsofmeasure.org"


def split_feed_rows(rows: pl.DataFrame) -> tuple[pl.DataFrame, dict[str, pl.DataFrame]]:
    """The rows a source's own export keeps, and the rows of each feed's analysers."""
    feed = pl.col("analyser_id").replace_strict(FEED_ANALYSERS, default=None, return_dtype=pl.String)
    tagged = rows.with_columns(feed.alias("_feed"))
    keep = tagged.filter(pl.col("_feed").is_null()).drop("_feed")
    feeds = {name: tagged.filter(pl.col("_feed") == name).drop("_feed") for name in FEED_PROFILES}
    return keep, {name: part for name, part in feeds.items() if part.height}


class _Layout:
    """What a feed's profile says about writing one field: its code, unit and code list."""

    def __init__(self, feed: str, profile_path: Path) -> None:
        raw = tomllib.loads(profile_path.read_text(encoding="utf-8"))
        self.feed = feed
        self.local_system = str(raw["profile"].get("local_code_system", ""))
        self.codes: dict[str, list[tuple[str, bool]]] = {}  # field -> [(code, is LOINC)] in profile order
        for code, name in raw.get("loinc", {}).items():
            self.codes.setdefault(name, []).append((code, True))
        for code, name in raw.get("local_codes", {}).items():
            self.codes.setdefault(name, []).append((code, False))
        self.sample_type_of_code: dict[str, str] = raw.get("loinc_sample_type", {})
        self.export = export_codes(profile_path)  # code list -> canonical -> export code

    def code(self, name: str, export_type: str | None) -> tuple[str, bool]:
        """A field's code: the one whose LOINC system axis is the sample's type, else the first."""
        choices = self.codes[name]
        for code, is_loinc in choices:
            if self.sample_type_of_code.get(code) == export_type:
                return code, is_loinc
        return choices[0]

    def unit(self, name: str) -> str:
        return FEED_UNITS[self.feed].get(name, CANONICAL_UNITS.get(name, ""))


def _texts(rows: pl.DataFrame, layout: _Layout, truth: pl.DataFrame) -> pl.DataFrame:
    """Every written field as text in the feed's unit, and the times in the feed's zone."""
    zone = ZONES[layout.feed]
    fmt = "%Y-%m-%dT%H:%M:%S%:z" if layout.feed == "fhir" else "%Y%m%d%H%M%S%z"
    texts = truth.filter(pl.col("fault_type") == "text_result").select("sample_id", "field", "cell_text")
    exprs = []
    for name in layout.codes:
        if name not in rows.columns:
            continue
        col = pl.col(name)
        if name in BOOLEANS:
            cell = pl.when(col).then(pl.lit("true")).when(~col).then(pl.lit("false"))
        elif name in CODED:
            cell = col.replace_strict(layout.export.get(name, {}), default=None, return_dtype=pl.String)
        else:
            unit = layout.unit(name)
            value = to_unit(col, name, unit) if name in CONVERTED else col
            cell = _number_text(value, DECIMALS[name].get(unit, 1), ".")
        field_texts = texts.filter(pl.col("field") == name)
        if field_texts.height:
            lookup = dict(zip(field_texts["sample_id"], field_texts["cell_text"], strict=True))
            cell = pl.coalesce(pl.col("sample_id").replace_strict(lookup, default=None, return_dtype=pl.String), cell)
        exprs.append(cell.alias(f"_v_{name}"))
    for name in ("collected_at", "resulted_at"):
        local = pl.col(name).dt.replace_time_zone("UTC").dt.convert_time_zone(zone)
        exprs.append(local.dt.strftime(fmt).alias(f"_t_{name}"))
    for name in ("sample_type", "collection_method"):
        exprs.append(
            pl.col(name)
            .replace_strict(layout.export.get(name, {}), default=None, return_dtype=pl.String)
            .alias(f"_c_{name}")
        )
    corrected = truth.filter(pl.col("fault_type") == "corrected_resend").get_column("sample_id")
    exprs.append((pl.col("sample_id").is_in(corrected.implode()) & (pl.col("_copy") == 1)).alias("_corrected"))
    return rows.with_columns(exprs)


def _number(text: str) -> float | int:
    value = float(text)
    return int(value) if value.is_integer() and "." not in text else value


def _fhir_lines(row: dict, layout: _Layout, written: set[str]) -> Iterator[str]:
    """The resources of one sample; Patient and Encounter once per file."""
    patient, encounter = f"Patient/{row['patient_id']}", f"Encounter/{row['encounter_id']}"
    if patient not in written:
        written.add(patient)
        yield json.dumps(
            {
                "resourceType": "Patient",
                "id": row["patient_id"],
                "identifier": [{"system": "https://saltmarsh-valley.example/mrn", "value": row["patient_id"]}],
            }
        )
    if encounter not in written:
        written.add(encounter)
        yield json.dumps(
            {
                "resourceType": "Encounter",
                "id": row["encounter_id"],
                "status": "in-progress",
                "class": {"system": "http://terminology.hl7.org/CodeSystem/v3-ActCode", "code": "IMP"},
                "subject": {"reference": patient},
                "location": [{"location": {"display": row["unit"]}}],
            }
        )
    specimen = f"Specimen/{row['sample_id']}"
    collection: dict = {"collectedDateTime": row["_t_collected_at"]}
    if row["operator_id"]:
        collection["collector"] = {"identifier": {"value": row["operator_id"]}}
    if row["_c_collection_method"]:
        collection["method"] = {"coding": [{"system": layout.local_system, "code": row["_c_collection_method"]}]}
    spec: dict = {
        "resourceType": "Specimen",
        "id": row["sample_id"],
        "accessionIdentifier": {"value": row["sample_id"]},
        "subject": {"reference": patient},
        "collection": collection,
    }
    if row["_c_sample_type"]:
        spec["type"] = {
            "coding": [{"system": "http://terminology.hl7.org/CodeSystem/v2-0487", "code": row["_c_sample_type"]}]
        }
    yield json.dumps(spec)
    status = "corrected" if row["_corrected"] else "final"
    for name in layout.codes:
        value = row.get(f"_v_{name}")
        if value is None:
            continue
        code, is_loinc = layout.code(name, row["_c_sample_type"])
        obs: dict = {
            "resourceType": "Observation",
            "id": f"{row['sample_id']}-{code}",
            "status": status,
            "code": {"coding": [{"system": LOINC_SYSTEM if is_loinc else layout.local_system, "code": code}]},
            "subject": {"reference": patient},
            "encounter": {"reference": encounter},
            "effectiveDateTime": row["_t_collected_at"],
            "issued": row["_t_resulted_at"],
            "device": {"display": row["analyser_id"]},
            "specimen": {"reference": specimen},
        }
        if name in BOOLEANS:
            obs["valueBoolean"] = value == "true"
        elif name in CODED:
            obs["valueCodeableConcept"] = {"coding": [{"system": layout.local_system, "code": value}]}
        else:
            try:
                number = _number(value)
            except ValueError:
                obs["valueString"] = value  # a text result in place of the number
            else:
                ucum = UCUM[layout.unit(name)]
                obs["valueQuantity"] = {"value": number, "unit": ucum, "system": UCUM_SYSTEM, "code": ucum}
        yield json.dumps(obs)


def _escape(text: str | None) -> str:
    """HL7 v2 escape sequences for the delimiters (HL7 v2.5.1 chapter 2, escape sequences in text fields)."""
    if text is None:
        return ""
    for char, seq in (("\\", "\\E\\"), ("|", "\\F\\"), ("^", "\\S\\"), ("&", "\\T\\"), ("~", "\\R\\")):
        text = text.replace(char, seq)
    return text


def _hl7_message(row: dict, layout: _Layout, number: int) -> str:
    e = _escape
    status = "C" if row["_corrected"] else "F"
    segments = [
        f"MSH|^~\\&|SVHLAB|SALTMARSH VALLEY|ABGAUDIT|SALTMARSH VALLEY|{row['_t_resulted_at']}||ORU^R01^ORU_R01|"
        f"SVH{number:08d}|P|2.5.1",
        f"PID|1||{e(row['patient_id'])}^^^SVH^MR||Invented^Patient",
        f"PV1|1|I|{e(row['unit'])}^^^SVH||||||||||||||||{e(row['encounter_id'])}",
        f"ORC|RE||{e(row['sample_id'])}",
        f"OBR|1||{e(row['sample_id'])}|24336-0^Gas panel^LN|||{row['_t_collected_at']}|||{e(row['operator_id'])}"
        f"||||||||||||{row['_t_resulted_at']}|||{status}",
    ]
    set_id = 0
    for name in layout.codes:
        value = row.get(f"_v_{name}")
        if value is None:
            continue
        set_id += 1
        code, is_loinc = layout.code(name, row["_c_sample_type"])
        system = "LN" if is_loinc else layout.local_system
        if name in BOOLEANS:
            kind, text, unit = "CWE", "Y" if value == "true" else "N", ""
        elif name in CODED:
            kind, text, unit = "CWE", f"{e(value)}^^{layout.local_system}", ""
        else:
            try:
                float(value)
            except ValueError:
                kind, text, unit = "ST", e(value), ""
            else:
                kind, text, unit = "NM", value, f"{UCUM[layout.unit(name)]}^^UCUM"
        segments.append(
            f"OBX|{set_id}|{kind}|{code}^^{system}||{text}|{unit}|||||{status}|||{row['_t_collected_at']}"
            f"||||{e(row['analyser_id'])}"
        )
    segments.append(
        f"SPM|1|||{e(row['_c_sample_type'])}^^{layout.local_system}|||"
        f"{e(row['_c_collection_method'])}^^{layout.local_system}"
    )
    # MLLP framing <VT> message <FS><CR> (MLLP; the bytes of hl7.mllp START_BLOCK, END_BLOCK)
    return "\x0b" + "\r".join(segments) + "\r\x1c\r"


def write_feed(
    feed: str, rows: pl.DataFrame, truth: pl.DataFrame, out_dir: Path, single_file: bool, profiles_dir: Path
) -> list[Path]:
    """One feed's files, one a day (the local date the result was produced) or one in all."""
    layout = _Layout(feed, profiles_dir / FEED_PROFILES[feed])
    rows = _texts(_export_rows(rows, truth, ZONES[feed]), layout, truth)
    folder = out_dir / feed
    folder.mkdir(parents=True, exist_ok=True)
    parts = (
        [("export_all", rows)]
        if single_file
        else [
            (f"export_{day.isoformat()}", part)
            for (day,), part in sorted(rows.partition_by("_export_date", as_dict=True).items())
            if isinstance(day, date)
        ]
    )
    written: list[Path] = []
    number = 0
    for stem, part in parts:
        target = folder / f"{stem}.{EXTENSIONS[feed]}"
        seen: set[str] = set()
        chunks: list[str] = []
        for row in part.iter_rows(named=True):
            number += 1
            if feed == "fhir":
                chunks.extend(line + "\n" for line in _fhir_lines(row, layout, seen))
            else:
                chunks.append(_hl7_message(row, layout, number))
        target.write_bytes("".join(chunks).encode("utf-8"))
        written.append(target)
    return written
