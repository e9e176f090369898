"""The derive and rules stages as an ordered list of SQL statements, for the network run.

The site's stages (``pipeline/derive.py``, ``pipeline/rules.py``) execute their ``sql/`` files on the
store; the network run executes the same files, in the same order, with the same parameters, on a
lake loaded into DuckDB or Spark. This module lists them; ``pipeline/network/translate.py`` turns
each into the target engine's SQL. The rules' statements (a record-level rule's SELECT wrapped in the
insert into ``flags``) come from ``pipeline.rules.rule_statements``, which the site's rules stage runs.

Differences from a site run, and why:
  * every lake row is in scope (``scope_samples`` is every record, ``scope_settings.rebuild`` is
    true and ``scope_runs`` is empty), so ``derive/00_scope.sql`` is not run and the stages' own
    "delete the rows in scope" steps find nothing to delete;
  * the site's pressure settings ($site_pb_mmhg, $site_altitude_m) differ per site, so they are read
    from columns of the network ``records`` (``SITE_COLUMN_PARAMETERS``) instead of one bound value.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

from pipeline.rules import Catalogue, rule_statements
from pipeline.sql_files import read_sql

# Parameters that are site settings: a column of the network records with the same name.
SITE_COLUMN_PARAMETERS = ("site_pb_mmhg", "site_altitude_m")
# The relations the stages leave; the network run writes these.
STAGE_OUTPUTS = (
    "derived",
    "flags",
    "audit_status",
    "analyser_qc",
    # the audit stage's aggregate layer (sql/audit/02_audit_layer_update.sql), before suppression
    "audit_unit_period_counts",
    "audit_unit_period_flags",
    "audit_unit_period_patients",
    "audit_unit_period_age_bands",
    "audit_unit_period_episodes",
)


@dataclass(frozen=True)
class Statement:
    """One SQL statement of a stage file, with the values of its named parameters."""

    source: str  # the file (and rule) it comes from, for messages and the list of untranslated ones
    sql: str
    params: dict[str, object] = field(default_factory=dict)
    # {record_columns} and {derived_columns} to fill with the select lists of records and derived
    # (sql/rules/00_rule_input.sql): the engine knows the columns only when it reaches the statement.
    column_lists: bool = False

    def text(self, columns_of: Callable[[str], list[str]]) -> str:
        if not self.column_lists:
            return self.sql
        return self.sql.format_map(column_lists(columns_of))


def column_lists(columns_of: Callable[[str], list[str]]) -> dict[str, str]:
    """Every column of records (alias r) and of derived but its key (alias d): the rules read some of
    them; the site narrows the lists to the columns the rules name, which changes no result."""
    return {
        "record_columns": ", ".join(f"r.{c}" for c in columns_of("records")),
        "derived_columns": ", ".join(f"d.{c}" for c in columns_of("derived") if c != "sample_id"),
    }


def _file_statements(relative_path: str, params: dict[str, object] | None = None) -> list[Statement]:
    text = read_sql(relative_path)
    if "{record_columns}" in text:  # one statement, split once its column lists are known
        return [Statement(f"sql/{relative_path}#1", text, dict(params or {}), column_lists=True)]
    return _split(f"sql/{relative_path}", text, params)


def _split(source: str, text: str, params: dict[str, object] | None) -> list[Statement]:
    """The statements of ``text``, numbered after their source."""
    import duckdb

    con = duckdb.connect()
    try:
        queries = [s.query for s in con.extract_statements(text)]
    finally:
        con.close()
    return [Statement(f"{source}#{n}", q, dict(params or {})) for n, q in enumerate(queries, start=1)]


def stage_statements(catalogue: Catalogue, run_id: str, period: str = "month") -> list[Statement]:
    """Derive (after the scope), rules and the audit's aggregate layer, in the order the site runs them."""
    statements = _file_statements("derive/05_prescription_link.sql")
    statements += _file_statements("derive/10_derived.sql", dict(catalogue.derive))
    statements += _file_statements("rules/00_rule_input.sql")
    statements += _file_statements(
        "rules/05_delta_neighbours.sql", dict(catalogue.rule("wrong_blood_in_tube").parameters)
    )
    statements += _file_statements("rules/10_flags_table.sql")
    for item in rule_statements(catalogue, run_id):
        statements += _split(f"sql/rules/{item.rule.id}.sql", item.sql, item.params)
    statements += _file_statements("rules/90_audit_status.sql", {"run_id": run_id})
    # The audit stage's aggregate layer, rebuilt whole (pipeline.audit: reset, then update). Its
    # settings fingerprint ($layer_sha256) only matters to a site's incremental runs.
    audit = {"period": period, "layer_sha256": f"network {period}"}
    statements += _file_statements("audit/01_audit_layer_reset.sql", audit)
    statements += _file_statements("audit/02_audit_layer_update.sql", audit)
    return statements
