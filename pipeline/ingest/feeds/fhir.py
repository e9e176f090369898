"""FHIR R4 bulk exports: NDJSON of Observation resources (with Patient, Encounter and
Specimen when present), or one Bundle of them, as observations for the grouping.

What each field comes from (FHIR R4, https://hl7.org/fhir/R4/observation.html section 8.1 and
the Patient, Encounter and Specimen resources):

==================  ==============================================================
sample_id           Specimen.accessionIdentifier.value of Observation.specimen; else
                    the specimen reference's id or logical identifier value
patient_id          Patient.identifier[0].value of Observation.subject; else the reference
birth_date          Patient.birthDate
encounter_id, unit  Encounter.identifier[0].value, Encounter.location[0].location.display
collected_at        Specimen.collection.collectedDateTime, else Observation.effectiveDateTime
resulted_at         Observation.issued (the latest of the record's results)
analyser_id         Observation.device.display (or its identifier value)
operator_id         Specimen.collection.collector identifier value (or display)
sample_type         Specimen.type.coding[0].code; else the LOINC system axis ([loinc_sample_type])
collection_method   Specimen.collection.method.coding[0].code
analytes            Observation.code (LOINC, or the profile's local system) and value[x]:
                    valueQuantity (value, comparator, UCUM ``code``), valueString,
                    valueCodeableConcept, valueBoolean, valueInteger; dataAbsentReason -> empty
status              final, amended, corrected: a result; preliminary, registered, unknown:
                    held back; entered-in-error, cancelled: withdrawn
==================  ==============================================================

Each line is parsed with the standard JSON parser and read for the elements above; the
first ``MODEL_CHECKED`` resources of a file are also validated whole by the R4 resource
models of ``fhir.resources`` (``fhir.resources.R4B``: R4B changed no element used here from
R4). Validating every resource costs about 0.7 ms each (measured: 1 M observations would take
over ten minutes), so the model check is a sample, like the batch contract's first rows.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

from pydantic import ValidationError

from pipeline.ingest.feeds.grouping import FINAL, HELD, WITHDRAWN, Fault, Grouper, Observation
from pipeline.ingest.feeds.mapping import LOCAL, LOINC, FeedMapping
from pipeline.ingest.feeds.timestamps import fhir_to_utc

LOINC_SYSTEM = "http://loinc.org"
UCUM_SYSTEM = "http://unitsofmeasure.org"
MODEL_CHECKED = 200
STATUS_CLASS = {
    "final": FINAL,
    "amended": FINAL,
    "corrected": FINAL,
    "preliminary": HELD,
    "registered": HELD,
    "unknown": HELD,
    "entered-in-error": WITHDRAWN,
    "cancelled": WITHDRAWN,
}
USED_TYPES = ("Observation", "Patient", "Encounter", "Specimen")


def model_problem(resource: dict[str, Any]) -> str | None:
    """Why the R4 resource model rejects a resource (element paths and error kinds, never
    values), or None when it accepts it."""
    from fhir.resources.R4B import get_fhir_model_class

    try:
        get_fhir_model_class(resource["resourceType"]).model_validate(resource)
    except ValidationError as err:
        places = "; ".join(f"{'.'.join(str(p) for p in e['loc'])}: {e['type']}" for e in err.errors()[:3])
        return f"the FHIR R4 model rejects the resource ({places})"
    except (KeyError, ValueError, TypeError) as err:
        return f"the FHIR R4 model rejects the resource ({type(err).__name__})"
    return None


def _lines(text: str) -> Iterator[str]:
    """The lines of NDJSON text one at a time (LF ends a line, CR before it is dropped);
    neither a list of every line nor a StringIO (four bytes a character) of a big export."""
    start = 0
    while start < len(text):
        end = text.find("\n", start)
        end = len(text) if end < 0 else end
        yield text[start:end].rstrip("\r")
        start = end + 1


def resources(text: str) -> Iterator[tuple[int, str, Any, str | None, str]]:
    """(order, where, resource or None, problem) for every resource of a Bundle file or
    every non-blank line of an NDJSON file. Numbers are kept as written (text)."""
    stripped = text.lstrip()
    if stripped.startswith("{") and '"Bundle"' in stripped[:4096]:
        try:
            whole = json.loads(text, parse_float=str, parse_int=str)
        except json.JSONDecodeError:
            whole = None
        if isinstance(whole, dict) and whole.get("resourceType") == "Bundle":
            for number, entry in enumerate(whole.get("entry") or [], start=1):
                resource = entry.get("resource") if isinstance(entry, dict) else None
                problem = None if isinstance(resource, dict) else "entry without a resource"
                yield number, f"Bundle entry {number}", resource, problem, json.dumps(entry)
            return
    for number, line in enumerate(_lines(text), start=1):
        if not line.strip():
            continue
        try:
            resource = json.loads(line, parse_float=str, parse_int=str)
        except json.JSONDecodeError as err:
            yield number, f"line {number}", None, f"not valid JSON ({err.msg} at column {err.colno})", line
            continue
        if not isinstance(resource, dict):
            yield number, f"line {number}", None, "not a JSON object", line
            continue
        yield number, f"line {number}", resource, None, line


def _first_code(concept: Any) -> str | None:
    if not isinstance(concept, dict):
        return None
    for coding in concept.get("coding") or []:
        if isinstance(coding, dict) and coding.get("code"):
            return str(coding["code"])
    return concept.get("text")


def _reference(ref: Any) -> str | None:
    """A Reference as a key: "Type/id", or "identifier|<value>" for a logical reference."""
    if not isinstance(ref, dict):
        return None
    if ref.get("reference"):
        return str(ref["reference"])
    ident = ref.get("identifier")
    if isinstance(ident, dict) and ident.get("value"):
        return f"identifier|{ident['value']}"
    return None


def _reference_value(key: str | None) -> str | None:
    """What a reference says on its own, when the file holds no resource for it."""
    if key is None:
        return None
    if key.startswith("identifier|"):
        return key.removeprefix("identifier|")
    return key.rsplit("/", 1)[-1]


def _identifier(resource: dict[str, Any]) -> str | None:
    for ident in resource.get("identifier") or []:
        if isinstance(ident, dict) and ident.get("value"):
            return str(ident["value"])
    return None


def _value(obs: dict[str, Any]) -> tuple[str | None, bool, str | None]:
    """(value text, is a quantity, UCUM code)."""
    quantity = obs.get("valueQuantity")
    if isinstance(quantity, dict):
        value = quantity.get("value")
        text = None if value is None else f"{quantity.get('comparator') or ''}{value}"
        system = quantity.get("system")
        ucum = quantity.get("code") if system in (None, UCUM_SYSTEM) else None
        if ucum is None and system is None:
            ucum = quantity.get("unit")
        return text, True, ucum
    if "valueString" in obs:
        return str(obs["valueString"]), False, None
    if "valueCodeableConcept" in obs:
        return _first_code(obs["valueCodeableConcept"]), False, None
    if "valueBoolean" in obs:
        return ("true" if obs["valueBoolean"] else "false"), False, None
    if "valueInteger" in obs:
        return str(obs["valueInteger"]), True, None
    return None, False, None


class FhirReader:
    """Reads one file into a Grouper; ``resolve`` then joins the Patient, Encounter and
    Specimen resources of the file to each record."""

    def __init__(self, mapping: FeedMapping, grouper: Grouper) -> None:
        self.mapping = mapping
        self.grouper = grouper
        self.patients: dict[str, dict[str, str | None]] = {}
        self.encounters: dict[str, dict[str, str | None]] = {}
        self.specimens: dict[str, dict[str, str | None]] = {}
        self.checked = 0
        self.other_types: dict[str, int] = {}

    def read(self, text: str) -> list[str]:
        for order, where, resource, problem, line in resources(text):
            if problem is not None:
                kind = "JSON_INVALID" if where.startswith("line") else "FHIR_INVALID"
                self.grouper.fault(Fault(order, kind, where, problem, line))
                continue
            self._resource(order, where, resource)
        notes = (
            [f"resources not used: {', '.join(f'{k} {v}' for k, v in sorted(self.other_types.items()))}"]
            if (self.other_types)
            else []
        )
        return notes

    def _resource(self, order: int, where: str, resource: dict[str, Any]) -> None:
        kind = resource.get("resourceType")
        if kind not in USED_TYPES:
            self.other_types[str(kind)] = self.other_types.get(str(kind), 0) + 1
            return
        if self.checked < MODEL_CHECKED:
            self.checked += 1
            problem = model_problem(resource)
            if problem is not None:
                self.grouper.fault(Fault(order, "FHIR_INVALID", where, problem, json.dumps(resource)))
                return
        key = f"{kind}/{resource.get('id')}"
        if kind == "Patient":
            self.patients[key] = {"patient_id": _identifier(resource), "birth_date": resource.get("birthDate")}
        elif kind == "Encounter":
            locations = resource.get("location") or [{}]
            place = locations[0].get("location") if isinstance(locations[0], dict) else None
            self.encounters[key] = {
                "encounter_id": _identifier(resource) or resource.get("id"),
                "unit": place.get("display") if isinstance(place, dict) else None,
            }
        elif kind == "Specimen":
            collection = resource.get("collection") or {}
            accession = resource.get("accessionIdentifier") or {}
            collector = collection.get("collector") or {}
            self.specimens[key] = {
                "sample_id": accession.get("value") or resource.get("id"),
                "sample_type": _first_code(resource.get("type")),
                "collection_method": _first_code(collection.get("method")),
                "collected_at": fhir_to_utc(collection.get("collectedDateTime")),
                "operator_id": _reference_value(_reference(collector))
                if collector.get("identifier")
                else collector.get("display"),
            }
        else:
            self._observation(order, where, resource)

    def _accession_key(self, obs: dict[str, Any]) -> str | None:
        """The group key: the specimen reference, or the identifier the profile names."""
        if self.mapping.group_by == "identifier":
            for ident in obs.get("identifier") or []:
                if (
                    isinstance(ident, dict)
                    and ident.get("system") == self.mapping.accession_system
                    and ident.get("value")
                ):
                    return f"identifier|{ident['value']}"
            return None
        return _reference(obs.get("specimen"))

    def _observation(self, order: int, where: str, obs: dict[str, Any]) -> None:
        specimen = self._accession_key(obs)
        status = STATUS_CLASS.get(str(obs.get("status")))
        if status is None:
            self.grouper.fault(
                Fault(
                    order,
                    "FHIR_INVALID",
                    where,
                    f"status {obs.get('status')!r} is not an R4 observation status",
                    json.dumps(obs),
                )
            )
            return
        codes = [c for c in (obs.get("code") or {}).get("coding") or [] if isinstance(c, dict)]
        found: dict[str, str | None] = {}  # field -> its LOINC code (None for a local code)
        for coding in codes:
            system, value = coding.get("system"), str(coding.get("code"))
            if system == LOINC_SYSTEM and (LOINC, value) in self.mapping.by_code:
                found.setdefault(self.mapping.by_code[(LOINC, value)], value)
            elif system == self.mapping.local_code_system and (LOCAL, value) in self.mapping.by_code:
                found.setdefault(self.mapping.by_code[(LOCAL, value)], None)
        if len(found) > 1:
            # one observation, two meanings (say SaO2 and SpO2): nothing is guessed
            self.grouper.fault(
                Fault(
                    order,
                    "UNKNOWN_OBSERVATION_CODE",
                    where,
                    f"codes map to several fields: {', '.join(sorted(found))}",
                    json.dumps(obs),
                    accession=specimen,
                )
            )
            return
        name, code = next(iter(found.items())) if found else (None, None)
        if name is None:
            if any(str(c.get("code")) in self.mapping.ignored_codes for c in codes):
                self.grouper.counts["ignored"] += 1
                return
            sent = ", ".join(f"{c.get('system')}|{c.get('code')}" for c in codes) or "none"
            self.grouper.fault(
                Fault(
                    order,
                    "UNKNOWN_OBSERVATION_CODE",
                    where,
                    f"observation code {sent} is not in the profile",
                    json.dumps(obs),
                    accession=specimen,
                )
            )
            return
        if specimen is None:
            missing = "Observation.specimen" if self.mapping.group_by == "specimen" else "the accession identifier"
            self.grouper.fault(Fault(order, "ACCESSION_MISSING", where, f"{missing} is missing", json.dumps(obs)))
            return
        value, quantity, ucum = _value(obs)
        device = obs.get("device") or {}
        self.grouper.add(
            Observation(
                accession=specimen,
                where=where,
                order=order,
                field=name,
                value=value,
                quantity=quantity,
                ucum=ucum,
                status=status,
                identity=str(obs.get("id") or f"{specimen}|{name}"),
                code=code,
                attributes={
                    "collected_at": fhir_to_utc(obs.get("effectiveDateTime")),
                    "resulted_at": fhir_to_utc(obs.get("issued")),
                    "analyser_id": device.get("display") or _reference_value(_reference(device)),
                    "patient_id": _reference(obs.get("subject")),
                    "encounter_id": _reference(obs.get("encounter")),
                },
            )
        )

    def resolve(self, key: str, attributes: dict[str, str | None]) -> tuple[str, dict[str, str | None], set[str]]:
        """The record's accession and attributes with the references replaced by what the
        referenced resources say; a field the specimen and the observations disagree on is
        returned as a conflict."""
        out = dict(attributes)
        clashes: set[str] = set()
        patient_ref = attributes.get("patient_id")
        patient = self.patients.get(patient_ref or "")
        out["patient_id"] = patient["patient_id"] if patient else _reference_value(patient_ref)
        if patient:
            out["birth_date"] = patient["birth_date"]
        encounter_ref = attributes.get("encounter_id")
        encounter = self.encounters.get(encounter_ref or "")
        out["encounter_id"] = encounter["encounter_id"] if encounter else _reference_value(encounter_ref)
        if encounter:
            out["unit"] = encounter["unit"]
        specimen = self.specimens.get(key)
        if specimen is None:
            return _reference_value(key) or key, out, clashes
        for name, value in specimen.items():
            if value is None or name == "sample_id":
                continue
            if out.get(name) not in (None, value):
                clashes.add(name)
            out[name] = value
        return specimen["sample_id"] or key, out, clashes
