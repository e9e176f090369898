"""The canonical blood gas record: one catalogue of every field the store holds.

Every stage speaks these names. A mapping profile maps a site's column headers onto
them; ingestion converts each value into the canonical unit given here. Hard limits are
the bounds outside which a number cannot be a measurement at all (a negative pressure,
a pH of 70, a saturation of 140 %); such a value goes to quarantine with reason
``IMPLAUSIBLE``. Values that are numbers a meter could show but no patient could have
(a PaO2 of 845 mmHg, Hb 137 g/dL, 98.6 in a Celsius column) are loaded and left to the
rules stage, which can explain them (decimal slip, other unit, physiological range).
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from functools import cached_property

import polars as pl


class Kind(StrEnum):
    TEXT = "text"
    NUMBER = "number"
    TIMESTAMP = "timestamp"
    DATE = "date"
    CODE = "code"
    BOOLEAN = "boolean"


# Unit families: the canonical unit first, then the alternatives a profile may declare.
UNIT_CHOICES: dict[str, tuple[str, ...]] = {
    "pressure": ("mmHg", "kPa"),
    "fraction": ("fraction", "percent"),
    "saturation": ("percent", "fraction"),
    "temperature": ("C", "F"),
    "haemoglobin": ("g/dL", "g/L", "mmol/L"),
    "lactate": ("mmol/L", "mg/dL"),
    "glucose": ("mmol/L", "mg/dL"),
    "concentration": ("mmol/L",),
    "flow": ("L/min",),
    "airway_pressure": ("cmH2O",),
    "age": ("years",),
    "ph": ("pH",),
}


@dataclass(frozen=True)
class Field:
    name: str
    kind: Kind
    description: str
    unit_family: str | None = None
    hard_min: float | None = None
    hard_max: float | None = None
    required: bool = False

    @property
    def canonical_unit(self) -> str | None:
        return UNIT_CHOICES[self.unit_family][0] if self.unit_family else None


SAMPLE_TYPES = ("arterial", "venous", "mixed_venous", "capillary", "unknown")

# How the blood was drawn; the sample type says what it is, this says where it came from
# (an arterial line sample can be a flush-diluted one, a capillary one is not arterial).
COLLECTION_METHODS = (
    "arterial_puncture",
    "arterial_line",
    "capillary",
    "venous_puncture",
    "central_venous_line",
    "unknown",
)

OXYGEN_DEVICES = (
    "room_air",
    "nasal_cannula",
    "simple_mask",
    "venturi_mask",
    "reservoir_mask",
    "high_flow_nasal",
    "cpap",
    "niv",
    "invasive_ventilation",
    "tracheostomy_mask",
    "other",
    "unknown",
)

# Hard limits are in the canonical unit and deliberately wide: physical bounds of the
# quantity, not of physiology (common practice).
FIELDS: tuple[Field, ...] = (
    Field("sample_id", Kind.TEXT, "The export's own sample or accession identifier.", required=True),
    Field("patient_id", Kind.TEXT, "Patient identifier (MRN); pseudonymised in every output."),
    Field("unit", Kind.TEXT, "Ward or location that ordered the sample."),
    Field("analyser_id", Kind.TEXT, "Analyser or source instrument, for patient-based QC."),
    Field("age_years", Kind.NUMBER, "Age at sampling in years.", "age", 0, 130),
    Field("birth_date", Kind.DATE, "Date of birth, used when age is not exported."),
    Field("collected_at", Kind.TIMESTAMP, "Sample collection time, stored as UTC.", required=True),
    Field("resulted_at", Kind.TIMESTAMP, "Time the analyser produced the result, stored as UTC."),
    Field("sample_type", Kind.CODE, "arterial, venous, mixed_venous, capillary or unknown."),
    Field("o2_device", Kind.CODE, "Documented oxygen device (canonical code)."),
    Field("o2_flow_l_min", Kind.NUMBER, "Documented oxygen flow.", "flow", 0, 100),
    Field("fio2", Kind.NUMBER, "Documented inspired oxygen fraction.", "fraction", 0, 1.0),
    Field("barometric_pressure_mmhg", Kind.NUMBER, "Barometric pressure at the analyser.", "pressure", 100, 1100),
    Field("temperature_c", Kind.NUMBER, "Patient temperature.", "temperature", 0, 110),
    Field("ph", Kind.NUMBER, "Arterial pH at 37 °C.", "ph", 0, 14),
    Field("paco2_mmhg", Kind.NUMBER, "PaCO2 at 37 °C.", "pressure", 0, 1000),
    Field("pao2_mmhg", Kind.NUMBER, "PaO2 at 37 °C.", "pressure", 0, 5000),
    Field("hco3_mmol_l", Kind.NUMBER, "Bicarbonate.", "concentration", 0, 200),
    Field("base_excess_mmol_l", Kind.NUMBER, "Base excess (may be negative).", "concentration", -100, 100),
    Field("sao2_pct", Kind.NUMBER, "Arterial oxygen saturation, co-oximetry.", "saturation", 0, 100),
    Field("sao2_is_calculated", Kind.BOOLEAN, "True when SaO2 was calculated from PO2, not measured."),
    Field("spo2_pct", Kind.NUMBER, "Pulse oximetry saturation near the time of sampling.", "saturation", 0, 100),
    Field("hb_g_dl", Kind.NUMBER, "Haemoglobin.", "haemoglobin", 0, 100),
    Field("na_mmol_l", Kind.NUMBER, "Sodium.", "concentration", 0, 1000),
    Field("k_mmol_l", Kind.NUMBER, "Potassium.", "concentration", 0, 100),
    Field("cl_mmol_l", Kind.NUMBER, "Chloride.", "concentration", 0, 1000),
    Field("lactate_mmol_l", Kind.NUMBER, "Lactate.", "lactate", 0, 300),
    Field("glucose_mmol_l", Kind.NUMBER, "Glucose (blood gas analyser).", "glucose", 0, 300),
    Field("cohb_pct", Kind.NUMBER, "Carboxyhaemoglobin (co-oximetry), % of total Hb.", "saturation", 0, 100),
    Field("methb_pct", Kind.NUMBER, "Methaemoglobin (co-oximetry), % of total Hb.", "saturation", 0, 100),
    Field("mean_airway_pressure_cmh2o", Kind.NUMBER, "Mean airway pressure (ventilated).", "airway_pressure", 0, 100),
    Field("peep_cmh2o", Kind.NUMBER, "PEEP or CPAP level.", "airway_pressure", 0, 60),
    Field("hypercapnic_risk", Kind.BOOLEAN, "Patient documented at risk of hypercapnic respiratory failure."),
    Field("encounter_id", Kind.TEXT, "Admission or episode identifier; pseudonymised to encounter_key."),
    Field("target_spo2_low_pct", Kind.NUMBER, "Prescribed SpO2 target range, low end.", "saturation", 0, 100),
    Field("target_spo2_high_pct", Kind.NUMBER, "Prescribed SpO2 target range, high end.", "saturation", 0, 100),
    Field("o2_prescribed", Kind.BOOLEAN, "Oxygen prescribed at sampling, as charted on the sample."),
    Field("collection_method", Kind.CODE, "How the sample was drawn (canonical code)."),
    Field("operator_id", Kind.TEXT, "Person who collected or ran the sample; pseudonymised to operator_key."),
)

FIELDS_BY_NAME: dict[str, Field] = {f.name: f for f in FIELDS}
# The polars type that holds each kind of field once parsed (ingest stages, test fixtures).
POLARS_TYPES: dict[Kind, pl.DataType] = {
    Kind.TEXT: pl.String(),
    Kind.CODE: pl.String(),
    Kind.NUMBER: pl.Float64(),
    Kind.TIMESTAMP: pl.Datetime("us"),
    Kind.DATE: pl.Date(),
    Kind.BOOLEAN: pl.Boolean(),
}
REQUIRED_FIELDS: tuple[str, ...] = tuple(f.name for f in FIELDS if f.required)
NUMBER_FIELDS: tuple[str, ...] = tuple(f.name for f in FIELDS if f.kind is Kind.NUMBER)

# Columns added by ingestion to every stored record (provenance).
PROVENANCE_COLUMNS: tuple[str, ...] = ("source_file", "source_row", "file_sha256", "run_id", "result_status")

# Code lists of the CODE fields: each is mapped by the profile's [codes.<field>] table.
CODE_LISTS: dict[str, tuple[str, ...]] = {
    "sample_type": SAMPLE_TYPES,
    "o2_device": OXYGEN_DEVICES,
    "collection_method": COLLECTION_METHODS,
}

# Identifier columns stored as keyed pseudonyms: identifier -> (pseudonym column, domain).
# The raw identifier is kept in the store only when the site keeps patient identifiers.
# Domain None is the patient pseudonym (unchanged since the first release); other
# identifiers are keyed by a key derived for their domain, so an encounter and a patient
# with the same text never share a pseudonym (pipeline/pseudonym.py).
PSEUDONYMISED: dict[str, tuple[str, str | None]] = {
    "patient_id": ("patient_key", None),
    "encounter_id": ("encounter_key", "encounter"),
    "operator_id": ("operator_key", "operator"),
}

RESULT_STATUSES = ("reported", "haemolysed", "clotted", "cancelled", "see_comment", "insufficient_sample")


# The oxygen prescriptions feed: one record per prescription (an order for oxygen with a
# target range). Fields shared with the sample record are the same Field, so names, units
# and hard limits cannot drift between the two.
PRESCRIPTION_FIELDS: tuple[Field, ...] = (
    Field("prescription_id", Kind.TEXT, "The source system's own oxygen order identifier.", required=True),
    Field(
        "patient_id",
        Kind.TEXT,
        "Patient identifier, the same as on the samples; pseudonymised to patient_key with the same key.",
        required=True,
    ),
    FIELDS_BY_NAME["encounter_id"],
    Field("unit", Kind.TEXT, "Ward where the oxygen was prescribed."),
    Field("start_at", Kind.TIMESTAMP, "Prescription start, stored as UTC.", required=True),
    Field("end_at", Kind.TIMESTAMP, "Prescription end, stored as UTC; empty means still active."),
    FIELDS_BY_NAME["target_spo2_low_pct"],
    FIELDS_BY_NAME["target_spo2_high_pct"],
    Field("o2_device", Kind.CODE, "Prescribed oxygen device (canonical code)."),
    Field("o2_flow_l_min", Kind.NUMBER, "Prescribed oxygen flow.", "flow", 0, 100),
    Field("fio2", Kind.NUMBER, "Prescribed inspired oxygen fraction.", "fraction", 0, 1.0),
    Field("prescriber_role", Kind.TEXT, "Role of the prescriber, e.g. doctor, nurse_practitioner (kept as is)."),
)
# A prescribed SpO2 target range must lie within this (percent) with low < high, else the
# row is quarantined as TARGET_RANGE_INVALID (common practice: no oxygen target is set
# below 50 %; the same bounds as [oxygen_targets] in the site configuration).
TARGET_RANGE_PCT: tuple[float, float] = (50.0, 100.0)


@dataclass(frozen=True)
class RecordSpec:
    """One kind of record a site delivers: its field catalogue, its key, its store tables
    and its stage SQL. Reading, parsing, dialects, time zones, code maps, duplicates and
    quarantine are the same code for every kind (pipeline/ingest/); only these differ."""

    kind: str  # the input kind: [[inputs]] kind and [profile] kind
    record_kind: str  # one record of it: quarantine.record_kind, merged_duplicates.record_kind
    fields: tuple[Field, ...]
    key_field: str  # one record per key; the same key with other values is a correction
    table: str
    superseded_table: str
    convert_sql: str  # stage 1 (units, hard limits, row checks) -> stage_units
    keys_sql: str  # stage 1b (pseudonyms, content hash) -> the view stage_converted
    value_notes: bool  # keep qualified values and text results in record_value_notes
    unit_sanity_sql: str | None  # file-level unit medians (pipeline.ingest.load.UNIT_SANITY)
    batch_contract: bool  # run the great-expectations batch contract (pipeline/contract.py)

    @cached_property
    def sql_names(self) -> dict[str, str]:
        """The kind's names for the shared stage SQL that has them in braces (40_merge.sql,
        45_unique_keys.sql): table names cannot be query parameters."""
        return {
            "table": self.table,
            "superseded_table": self.superseded_table,
            "key": self.key_field,
            "record_kind": self.record_kind,
            # merged_duplicates.sample_id holds the key of a sample and nothing for other kinds
            # (a staged row's key is its record_id, 30_classify.sql)
            "staged_sample_id": "record_id" if self.key_field == "sample_id" else "null",
        }

    @cached_property
    def fields_by_name(self) -> dict[str, Field]:
        return {f.name: f for f in self.fields}

    @cached_property
    def required(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.fields if f.required)

    @cached_property
    def unit_fields(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.fields if f.unit_family is not None)

    @cached_property
    def code_fields(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.fields if f.kind is Kind.CODE)


SAMPLES = RecordSpec(
    kind="samples",
    record_kind="sample",
    fields=FIELDS,
    key_field="sample_id",
    table="records",
    superseded_table="superseded_records",
    convert_sql="ingest/10_convert.sql",
    keys_sql="ingest/15_keys_and_hash.sql",
    unit_sanity_sql="ingest/20_unit_sanity.sql",
    value_notes=True,
    batch_contract=True,
)
# The batch contract is the sample record's (analyte ranges, sample codes); a prescription
# is checked by its row reasons (required fields, hard limits, TARGET_RANGE_INVALID,
# END_BEFORE_START) and the whole-file checks shared with samples.
PRESCRIPTIONS = RecordSpec(
    kind="prescriptions",
    record_kind="prescription",
    fields=PRESCRIPTION_FIELDS,
    key_field="prescription_id",
    table="prescriptions",
    superseded_table="superseded_prescriptions",
    convert_sql="ingest/10_convert_prescriptions.sql",
    keys_sql="ingest/15_keys_and_hash_prescriptions.sql",
    unit_sanity_sql="ingest/20_unit_sanity_prescriptions.sql",
    value_notes=False,
    batch_contract=False,
)
RECORD_SPECS: dict[str, RecordSpec] = {spec.kind: spec for spec in (SAMPLES, PRESCRIPTIONS)}
# Every field of every kind, once: hard limits are per field name (store.field_limits).
ALL_FIELDS: tuple[Field, ...] = tuple(
    {f.name: f for spec in RECORD_SPECS.values() for f in spec.fields}.values()
)
