"""UCUM unit codes a feed may send, as the unit names of ``pipeline.schema.UNIT_CHOICES``.

Feeds carry the unit of every value (FHIR ``valueQuantity.code`` with system
http://unitsofmeasure.org, HL7 v2 OBX-6). The value is handed on in the unit it came in,
with that unit, and converted by the loader's own unit code; a unit not in this table, or
not a unit of the field's family, is a row reason (``UNIT_UNKNOWN``), never a guess.

Codes are UCUM's case-sensitive ("c/s") symbols (The Unified Code for Units of Measure,
https://ucum.org/ucum, section 2.1 and the tables of section 4-5: ``mm[Hg]`` millimetre of
mercury, ``kPa`` kilopascal, ``%`` percent, ``1`` the unity, ``Cel`` degree Celsius,
``[degF]`` degree Fahrenheit, ``[pH]`` pH, ``cm[H2O]`` centimetre of water, ``a`` year,
``L/min``, ``g/dL``, ``g/L``, ``mmol/L``, ``mg/dL``).
"""

from __future__ import annotations

from pipeline.schema import UNIT_CHOICES

# UCUM code -> our unit name, per unit family (the same symbol means different things in
# different families: "%" is a percent of saturation or of inspired gas).
UCUM_UNITS: dict[str, dict[str, str]] = {
    "pressure": {"mm[Hg]": "mmHg", "kPa": "kPa"},
    "fraction": {"%": "percent", "1": "fraction", "{fraction}": "fraction"},
    "saturation": {"%": "percent", "1": "fraction", "{fraction}": "fraction"},
    "temperature": {"Cel": "C", "[degF]": "F"},
    "haemoglobin": {"g/dL": "g/dL", "g/L": "g/L", "mmol/L": "mmol/L"},
    "lactate": {"mmol/L": "mmol/L", "mg/dL": "mg/dL"},
    "glucose": {"mmol/L": "mmol/L", "mg/dL": "mg/dL"},
    "concentration": {"mmol/L": "mmol/L", "meq/L": "mmol/L"},
    "flow": {"L/min": "L/min"},
    "airway_pressure": {"cm[H2O]": "cmH2O"},
    "age": {"a": "years"},
    "ph": {"[pH]": "pH"},
}
# meq/L equals mmol/L for the monovalent ions the concentration family holds (sodium,
# potassium, chloride, bicarbonate; common practice).

assert all(set(units.values()) <= set(UNIT_CHOICES[family]) for family, units in UCUM_UNITS.items())


def unit_name(ucum: str | None, family: str) -> str | None:
    """Our name of a UCUM unit within a family; None when the family has no such unit.

    A value without a unit is accepted only where the family has a single unit (pH is
    often sent without ``[pH]``): there is nothing to guess."""
    if ucum is None or ucum.strip() == "":
        choices = UNIT_CHOICES[family]
        return choices[0] if len(choices) == 1 else None
    return UCUM_UNITS[family].get(ucum.strip())
