"""The DuckDB macros of ``sql/macros/`` inlined into a statement, for engines without macros.

Each ``CREATE OR REPLACE TEMP MACRO name(params) AS body`` becomes a ``Macro``; expanding a
statement replaces every call of a macro by its body with the call's arguments put in place of the
parameters (positional first, then ``name := value``, then the defaults), each argument in
parentheses so operator precedence cannot change. Bodies call other macros, so expansion repeats
until no macro call is left. The formulas stay in ``sql/macros/``; nothing is copied by hand.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import cache

import duckdb
import sqlglot
from sqlglot import exp

from pipeline.sql_files import SQL_DIR

_HEADER = re.compile(r"CREATE\s+OR\s+REPLACE\s+TEMP\s+MACRO\s+(\w+)\s*\((.*?)\)\s+AS\s+(.*)$", re.I | re.S)
MAX_DEPTH = 20


@dataclass(frozen=True)
class Macro:
    name: str
    params: tuple[str, ...]
    defaults: dict[str, exp.Expression]
    body: exp.Expression


def parse_macro(text: str) -> Macro:
    """One ``CREATE ... MACRO`` statement (comment lines allowed before it)."""
    code = "\n".join(line for line in text.splitlines() if not line.lstrip().startswith("--"))
    match = _HEADER.search(code)
    if match is None:
        raise ValueError(f"not a scalar macro definition: {code[:80]!r}")
    name, params_text, body_text = match.groups()
    params: list[str] = []
    defaults: dict[str, exp.Expression] = {}
    for part in (p.strip() for p in params_text.split(",") if p.strip()):
        if ":=" in part:
            param, default = (s.strip() for s in part.split(":=", 1))
            defaults[param.lower()] = sqlglot.parse_one(default, read="duckdb")
            params.append(param.lower())
        else:
            params.append(part.lower())
    body = sqlglot.parse_one(body_text.strip().rstrip(";"), read="duckdb")
    return Macro(name.lower(), tuple(params), defaults, body)


@cache
def load_macros() -> dict[str, Macro]:
    """Every macro of ``sql/macros/*.sql``, by lower-case name."""
    con = duckdb.connect()
    try:
        macros = {}
        for path in sorted((SQL_DIR / "macros").glob("*.sql")):
            for statement in con.extract_statements(path.read_text(encoding="utf-8")):
                macro = parse_macro(statement.query)
                macros[macro.name] = macro
        return macros
    finally:
        con.close()


def _call_name(node: exp.Expression) -> str | None:
    if isinstance(node, exp.Anonymous):
        return str(node.this).lower()
    return None


def _bind(macro: Macro, call: exp.Anonymous) -> dict[str, exp.Expression]:
    """Argument expression per parameter of ``macro`` for this call."""
    bound: dict[str, exp.Expression] = {}
    positional = [a for a in call.expressions if not isinstance(a, (exp.PropertyEQ, exp.Kwarg))]
    named = [a for a in call.expressions if isinstance(a, (exp.PropertyEQ, exp.Kwarg))]
    if len(positional) > len(macro.params):
        raise ValueError(f"macro {macro.name} takes {len(macro.params)} arguments, called with {len(positional)}")
    for param, arg in zip(macro.params, positional, strict=False):
        bound[param] = arg
    for arg in named:
        param = arg.this.name.lower()
        if param not in macro.params:
            raise ValueError(f"macro {macro.name} has no parameter {param}")
        bound[param] = arg.expression
    for param in macro.params:
        if param not in bound:
            if param not in macro.defaults:
                raise ValueError(f"macro {macro.name}: parameter {param} has no argument and no default")
            bound[param] = macro.defaults[param]
    return bound


def _substitute(body: exp.Expression, bound: dict[str, exp.Expression]) -> exp.Expression:
    def replace(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Column) and not node.table and node.name.lower() in bound:
            return exp.Paren(this=bound[node.name.lower()].copy())
        return node

    return body.copy().transform(replace)


def expand_macros(tree: exp.Expression, macros: dict[str, Macro] | None = None) -> exp.Expression:
    """``tree`` with every macro call replaced by the macro's body (repeated for nested macros)."""
    macros = load_macros() if macros is None else macros
    for _ in range(MAX_DEPTH):
        found = False

        def replace(node: exp.Expression) -> exp.Expression:
            nonlocal found
            name = _call_name(node)
            if name is not None and name in macros:
                found = True
                macro = macros[name]
                return exp.Paren(this=_substitute(macro.body, _bind(macro, node)))
            return node

        tree = tree.transform(replace)
        if not found:
            return tree
    raise ValueError(f"macro expansion did not finish in {MAX_DEPTH} rounds (a macro calls itself?)")
