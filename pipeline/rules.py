"""The rule catalogue and its evaluation in DuckDB.

The catalogue (``pipeline/catalogue.toml``) lists every rule once with its metadata and
parameters; each record-level rule is one SELECT in ``sql/rules/<id>.sql`` returning
``sample_id, severity, message, evidence``. Evaluation writes the ``flags`` table (one
row per sample and rule) and the ``audit_status`` of each record, for the samples in
``scope_samples`` only, so a nightly run costs what its new data costs.
"""

from __future__ import annotations

import hashlib
import json
import re
import tomllib
from dataclasses import dataclass, field
from functools import cache
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from pipeline.errors import ConfigError
from pipeline.sql_files import SQL_DIR, read_sql, run_sql

CATALOGUE_PATH = Path(__file__).resolve().parent / "catalogue.toml"
KINDS = ("data_quality", "documentation", "clinical", "analyser_qc")
SEVERITIES = ("high", "medium", "low", "info")
_RESERVED = {"rule_id", "rule_kind", "default_severity", "run_id"}
# Parameter names that pair a lower limit with a higher one: a name with the first word is
# the lower limit of the name with the second word in its place (warn_minutes <=
# strong_minutes, pao2_min_mmhg <= pao2_max_mmhg, target_low <= target_high).
_ORDERED_WORDS = (("warn", "strong"), ("moderate", "severe"), ("low", "high"), ("min", "max"))
_LIMIT_NAMES = {"warn": "warning", "min": "minimum", "max": "maximum"}


@dataclass(frozen=True)
class Rule:
    id: str
    title: str
    kind: str
    severity: str
    excludes_from_oxygenation: bool
    rationale: str
    reference: str
    parameters: dict[str, Any] = field(default_factory=dict)

    @property
    def sql_path(self) -> Path:
        return SQL_DIR / "rules" / f"{self.id}.sql"


@dataclass(frozen=True)
class Catalogue:
    version: str
    sha256: str
    derive: dict[str, Any]
    rules: tuple[Rule, ...]

    def rule(self, rule_id: str) -> Rule:
        return next(r for r in self.rules if r.id == rule_id)


def load_catalogue(overrides: dict[str, Any] | None = None, path: Path = CATALOGUE_PATH) -> Catalogue:
    """Read the catalogue and apply a site's ``[thresholds]`` overrides (unknown names are errors)."""
    data = path.read_bytes()
    raw = tomllib.loads(data.decode("utf-8"))
    overrides = dict(overrides or {})
    derive = dict(raw["derive"])
    derive_overrides = overrides.pop("derive", {})
    for name, value in derive_overrides.items():
        if name not in derive:
            raise ConfigError(f"[thresholds.derive] {name} is not a derive parameter; known: {', '.join(derive)}")
        derive[name] = _like(derive[name], value, f"[thresholds.derive] {name}")
    rules = []
    for item in raw["rule"]:
        params = dict(item.get("parameters", {}))
        for name, value in overrides.pop(item["id"], {}).items():
            if name not in params:
                known = ", ".join(params) or "none"
                raise ConfigError(f"[thresholds.{item['id']}] {name} is not a parameter of this rule; known: {known}")
            params[name] = _like(params[name], value, f"[thresholds.{item['id']}] {name}")
        if item["kind"] not in KINDS or item["severity"] not in SEVERITIES:
            raise ConfigError(f"catalogue rule {item['id']}: bad kind or severity")
        if _RESERVED & params.keys():
            raise ConfigError(f"catalogue rule {item['id']}: parameter names {_RESERVED & params.keys()} are reserved")
        rules.append(
            Rule(
                id=item["id"],
                title=item["title"],
                kind=item["kind"],
                severity=item["severity"],
                excludes_from_oxygenation=bool(item["excludes_from_oxygenation"]),
                rationale=" ".join(item["rationale"].split()),
                reference=item["reference"],
                parameters=params,
            )
        )
    if overrides:
        raise ConfigError(f"[thresholds] names unknown rules: {', '.join(sorted(overrides))}")
    _check_order(derive, "[thresholds.derive]")
    for rule in rules:
        _check_order(rule.parameters, f"[thresholds.{rule.id}]")
    effective = json.dumps({"derive": derive, "rules": [(r.id, r.parameters) for r in rules]}, sort_keys=True)
    digest = hashlib.sha256(data + effective.encode()).hexdigest()
    return Catalogue(version=str(raw["version"]), sha256=digest, derive=derive, rules=tuple(rules))


def _check_order(parameters: dict[str, Any], section: str) -> None:
    """A lower limit above its higher one (a warning above its strong limit, a low above a
    high) is a contradiction no rule can apply: a configuration error naming both keys."""
    for name, lower in parameters.items():
        words = name.split("_")
        for low_word, high_word in _ORDERED_WORDS:
            if low_word not in words:
                continue
            partner = "_".join(high_word if w == low_word else w for w in words)
            higher = parameters.get(partner)
            if _number(lower) and _number(higher) and lower > higher:
                raise ConfigError(
                    f"{section} {name} = {lower} is above {partner} = {higher}: the "
                    f"{_LIMIT_NAMES.get(low_word, low_word)} limit must not exceed the "
                    f"{_LIMIT_NAMES.get(high_word, high_word)} one; change one of the two "
                    "(`abg-audit rules` shows the defaults)"
                )


def _number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _like(default: Any, value: Any, where: str) -> Any:
    """An override takes the type of the catalogue default (20 for 20.0 is fine, "20" is not)."""
    if isinstance(default, bool) or isinstance(value, bool):
        if isinstance(default, bool) and isinstance(value, bool):
            return value
    elif isinstance(default, float) and isinstance(value, (int, float)):
        return float(value)
    elif isinstance(default, int) and isinstance(value, int):
        return value
    elif isinstance(default, str) and isinstance(value, str):
        return value
    raise ConfigError(f"{where} = {value!r}: expected a {type(default).__name__} like the default {default!r}")


def catalogue_frame(catalogue: Catalogue) -> pl.DataFrame:
    return pl.DataFrame(
        [
            {
                "rule_id": r.id,
                "title": r.title,
                "kind": r.kind,
                "severity": r.severity,
                "excludes_from_oxygenation": r.excludes_from_oxygenation,
                "rationale": r.rationale,
                "reference": r.reference,
                "parameters": json.dumps(r.parameters),
                "catalogue_version": catalogue.version,
            }
            for r in catalogue.rules
        ]
    )


def store_catalogue(con: duckdb.DuckDBPyConnection, catalogue: Catalogue) -> None:
    """Keep the catalogue in effect in the store so analysts and the report can read it."""
    frame = catalogue_frame(catalogue)
    con.register("catalogue_frame", frame)
    try:
        con.execute("create or replace table rule_catalogue as select * from catalogue_frame")
    finally:
        con.unregister("catalogue_frame")


def rule_input_columns(con: duckdb.DuckDBPyConnection) -> dict[str, str]:
    """The columns of ``records`` and ``derived`` that some rule's SQL names (by whole word),
    as the select lists of ``rules/00_rule_input.sql``; ``sample_id`` always."""
    used = set(re.findall(r"[a-z_][a-z0-9_]*", _rules_sql_text()))

    def columns(table: str, alias: str) -> str:
        names = [row[0] for row in con.execute(f"describe {table}").fetchall()]
        return ", ".join(f"{alias}.{n}" for n in names if n in used and (n != "sample_id" or alias == "r"))

    return {"record_columns": columns("records", "r"), "derived_columns": columns("derived", "d")}


@cache
def _rules_sql_text() -> str:
    """The SQL of every rule and shared rule step that reads ``rule_input``, in lower case."""
    paths = [p for p in (SQL_DIR / "rules").glob("*.sql") if p.name != "00_rule_input.sql"]
    return "\n".join(p.read_text(encoding="utf-8") for p in sorted(paths)).lower() + "\nsample_id"


@dataclass(frozen=True)
class RuleStatement:
    """What one rule runs: its SQL (one or more statements) and the values of its named parameters."""

    rule: Rule
    sql: str
    params: dict[str, Any]


def rule_statements(catalogue: Catalogue, run_id: str) -> list[RuleStatement]:
    """Every rule's SQL in catalogue order, as the site's rules stage and the network run
    (pipeline/network/stages.py) execute it: an analyser check's file as written; a record-level
    rule's SELECT wrapped in the insert of its rows into ``flags``."""
    statements = []
    for rule in catalogue.rules:
        text = read_sql(f"rules/{rule.id}.sql")
        if rule.kind == "analyser_qc":
            statements.append(RuleStatement(rule, text, dict(rule.parameters)))
            continue
        select = text.strip().rstrip(";")
        sql = (
            "insert into flags (sample_id, rule_id, kind, severity, message, evidence, run_id) "
            "select sample_id, $rule_id, $rule_kind, coalesce(severity, $default_severity), message, "
            f"evidence::varchar, $run_id from ({select})"
        )
        params = {
            **rule.parameters,
            "rule_id": rule.id,
            "rule_kind": rule.kind,
            "default_severity": rule.severity,
            "run_id": run_id,
        }
        statements.append(RuleStatement(rule, sql, params))
    return statements


def evaluate_rules(con: duckdb.DuckDBPyConnection, catalogue: Catalogue, run_id: str) -> dict[str, int]:
    """Replace flags and audit status of the samples in ``scope_samples``; return flag counts per rule."""
    store_catalogue(con, catalogue)
    run_sql(con, "rules/00_rule_input.sql", sql_names=rule_input_columns(con))
    # The delta checks of three rules share one pass over each patient's results.
    run_sql(con, "rules/05_delta_neighbours.sql", **catalogue.rule("wrong_blood_in_tube").parameters)
    con.execute(read_sql("rules/10_flags_table.sql"))
    con.execute("delete from flags where sample_id in (select sample_id from scope_samples)")
    counts: dict[str, int] = {}
    for item in rule_statements(catalogue, run_id):
        for statement in con.extract_statements(item.sql):
            used = statement.named_parameters
            con.execute(statement.query, {k: v for k, v in item.params.items() if k in used})
        rule = item.rule
        if rule.kind == "analyser_qc":
            counts[rule.id] = con.execute("select count(*) from analyser_qc where signal").fetchall()[0][0]
            continue
        counts[rule.id] = con.execute(
            "select count(*) from flags where rule_id = ? and run_id = ?", [rule.id, run_id]
        ).fetchall()[0][0]
    run_sql(con, "rules/90_audit_status.sql", run_id=run_id)
    return counts


def rule_sql_files() -> list[Path]:
    return sorted(p for p in (SQL_DIR / "rules").glob("*.sql") if not p.name[0].isdigit())
