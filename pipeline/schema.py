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

RESULT_STATUSES = ("reported", "haemolysed", "clotted", "cancelled", "see_comment", "insufficient_sample")
