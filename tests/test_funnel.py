"""Funnel plots that compare units fairly: a centre line per unit type and limits widened for
over-dispersion (Spiegelhalter DJ 2005, "Handling over-dispersion of performance indicators",
Qual Saf Health Care 14:347-351; details from memory).

The funnel SQL (sql/audit/40_audit_funnel.sql, 41_audit_funnel_curve.sql) runs here over a small
``audit_cell`` built by hand with the unit-type level, so each check is about the funnel alone.
Oracles, named beside each check: statsmodels ``combine_effects(method_re="dl")`` for the additive
between-unit variance, ``scipy.stats.mstats.winsorize`` for the winsorised z-scores,
``scipy.stats.norm`` for the binomial normal-approximation limits, and hand-computed examples.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable
from datetime import datetime, timedelta
from typing import Any

import duckdb
import numpy as np
import pytest
from scipy.stats import norm
from scipy.stats.mstats import winsorize
from statsmodels.stats.meta_analysis import combine_effects

from pipeline.sql_files import install_macros, run_sql
from tests.audit_store import audit, audit_config, build_store, frame
from tests.rule_harness import record

Z95 = float(norm.ppf(0.975))
Z998 = float(norm.ppf(0.999))


@dataclasses.dataclass(frozen=True)
class Unit:
    name: str
    unit_type: str
    x: int
    n: int


def cells(units: list[Unit], hidden: Iterable[tuple[str | None, str | None, str]] = (), type_level: bool = True):
    """audit_cell rows (family, unit, unit_type, value, hidden) for the whole window: each unit, each type (when
    ``type_level``) and the site. ``hidden`` holds (unit, unit_type, family) of the cells to hide."""
    hide = set(hidden)
    rows = []
    for u in units:
        for family, value in (("num", u.x), ("den", u.n)):
            rows.append((family, u.name, u.unit_type, value, (u.name, u.unit_type, family) in hide))
    places = sorted({u.unit_type for u in units}) if type_level else []
    for t in places:
        members = [u for u in units if u.unit_type == t]
        for family, value in (("num", sum(u.x for u in members)), ("den", sum(u.n for u in members))):
            rows.append((family, None, t, value, (None, t, family) in hide))
    for family, value in (("num", sum(u.x for u in units)), ("den", sum(u.n for u in units))):
        rows.append((family, None, None, value, (None, None, family) in hide))
    return rows


def build(
    units: list[Unit],
    *,
    overdispersion: str = "additive",
    winsorize_pct: float = 10.0,
    hidden: Iterable[tuple[str | None, str | None, str]] = (),
    type_level: bool = True,
) -> duckdb.DuckDBPyConnection:
    """A connection with audit_measure (one measure), audit_cell and the funnel tables built from them."""
    con = duckdb.connect()
    install_macros(con)
    con.execute(
        "create temp table audit_measure as select * from (values (1, 'm', 'Test measure', 'oxygenation', "
        "'num', 'den', 'num among den')) as m(sort_order, measure, title, basis, numerator_family, "
        "denominator_family, definition)"
    )
    con.execute(
        "create temp table audit_cell (cell_id bigint, family varchar, unit varchar, unit_type varchar, "
        "period_start date, value bigint, additive boolean, hidden boolean, hidden_reason varchar)"
    )
    rows = cells(units, hidden, type_level)
    con.executemany(
        "insert into audit_cell values (?, ?, ?, ?, null, ?, true, ?, case when ? then 'test' end)",
        [[i + 1, f, u, t, v, h, h] for i, (f, u, t, v, h) in enumerate(rows)],
    )
    params = {"funnel_overdispersion": overdispersion, "winsorize_pct": winsorize_pct}
    run_sql(con, "audit/40_audit_funnel.sql", **params)
    run_sql(con, "audit/41_audit_funnel_curve.sql", **params)
    return con


def rows(con: duckdb.DuckDBPyConnection, table: str = "audit_funnel") -> list[dict[str, Any]]:
    return con.sql(f"select * from {table}").pl().to_dicts()


def by_unit(con: duckdb.DuckDBPyConnection) -> dict[str, dict[str, Any]]:
    return {r["unit"]: r for r in rows(con)}


def z_scores(units: list[Unit]) -> tuple[float, np.ndarray, np.ndarray]:
    """The type's centre p0 = sum x / sum n, each unit's z-score and binomial variance around it."""
    x = np.array([u.x for u in units], dtype=float)
    n = np.array([u.n for u in units], dtype=float)
    p0 = x.sum() / n.sum()
    variance = p0 * (1 - p0) / n
    return p0, (x / n - p0) / np.sqrt(variance), variance


def spiegelhalter_tau2(z: np.ndarray, variance: np.ndarray) -> float:
    """Spiegelhalter 2005 (from memory): tau^2 = max(0, (I phi - (I - 1)) / (sum w - sum w^2 / sum w)), w = 1 / s^2,
    written out here in numpy from the paper's formula, independently of the SQL macros."""
    w = 1 / variance
    return max(0.0, (float(np.sum(z**2)) - (len(z) - 1)) / (w.sum() - (w**2).sum() / w.sum()))


def dersimonian_laird(units: list[Unit]) -> Any:
    """Oracle: statsmodels combine_effects(method_re="dl") on the units' rates with the binomial variances around
    the type's centre. Its random-effects weights 1 / (v + tau2) use the untruncated tau2, which may be negative and
    make a sqrt of its own side results invalid (a numpy warning, not a result used here)."""
    _, _, variance = z_scores(units)
    with np.errstate(invalid="ignore"):
        return combine_effects(np.array([u.x / u.n for u in units]), variance, method_re="dl")


# Twelve wards whose rates vary far more than their volumes explain (invented numbers).
SPREAD = [
    Unit(f"Ward {chr(65 + i)}", "ward", x, n)
    for i, (x, n) in enumerate(
        [(12, 240), (40, 310), (9, 95), (70, 420), (25, 180), (5, 150),
         (33, 160), (60, 600), (18, 75), (44, 220), (8, 130), (29, 350)]
    )
]  # fmt: skip
# Twenty wards, two far out at each end: winsorising at 10 % pulls in exactly those four.
RNG = np.random.default_rng(20260311)
TWENTY = [
    Unit(f"W{i:02d}", "ward", int(x), int(n))
    for i, (x, n) in enumerate(
        zip(
            [*RNG.binomial(200, 0.15, 16), 2, 3, 70, 80],
            [200] * 16 + [150, 180, 210, 240],
            strict=True,
        )
    )
]


# --------------------------------------------------------------------------------------
# Over-dispersion estimates against general-purpose libraries
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize(("units", "pct"), [(SPREAD, 0.0), (SPREAD[:8], 10.0)])
def test_additive_tau2_is_the_dersimonian_laird_estimate(units, pct):
    # Oracle: statsmodels combine_effects(method_re="dl"), the DerSimonian-Laird moment estimator. Why they agree:
    # DL's fixed-effect mean is the inverse-variance weighted mean of y_i; with the variances taken at the common
    # centre, s_i^2 = p0 (1 - p0) / n_i, the weights are proportional to n_i, so that mean is sum(n_i y_i) / sum n_i
    # = sum x / sum n = p0, the type's rate. Then DL's Q = sum w_i (y_i - p0)^2 = sum z_i^2 = I phi, and DL's
    # tau^2 = max(0, (Q - (I - 1)) / (sum w - sum w^2 / sum w)) is Spiegelhalter's additive tau^2, as long as no
    # z-score is winsorised (winsorize_pct 0, or 10 % of 8 units: floor(0.8) = 0 pulled in).
    con = build(units, winsorize_pct=pct)
    p0, _, _ = z_scores(units)
    dl = dersimonian_laird(units)
    assert dl.mean_effect_fe == pytest.approx(p0, rel=1e-12)  # the reason above, checked
    got = rows(con)
    assert [r["overall_rate"] for r in got] == pytest.approx([p0] * len(units), rel=1e-12)
    assert got[0]["units_in_estimate"] == len(units)
    assert got[0]["phi"] == pytest.approx(dl.q / len(units), rel=1e-9)
    assert got[0]["tau2"] == pytest.approx(dl.tau2, rel=1e-9)
    assert dl.tau2 > 0  # these wards are over-dispersed: the check is not of a zero against a zero
    assert {r["overdispersion"] for r in got} == {"additive"}


def test_estimate_macros_directly_against_dersimonian_laird():
    # The three estimate macros called on their own, on the sums the funnel SQL passes them. Oracle: statsmodels
    # combine_effects(method_re="dl") (Q = sum z^2 and tau^2), and w = 1 / s^2 with s^2 = p0 (1 - p0) / n.
    p0, z, variance = z_scores(SPREAD)
    dl = dersimonian_laird(SPREAD)
    con = duckdb.connect()
    install_macros(con)
    weights = [con.execute("select funnel_weight(?, ?)", [p0, u.n]).fetchone()[0] for u in SPREAD]
    assert weights == pytest.approx(list(1 / variance), rel=1e-12)
    sum_z2, units, sum_w, sum_w2 = (
        float((z**2).sum()),
        len(SPREAD),
        float(sum(weights)),
        float(sum(w * w for w in weights)),
    )
    phi, tau2 = con.execute(
        "select overdispersion_phi(?, ?), overdispersion_tau2(?, ?, ?, ?)",
        [sum_z2, units, sum_z2, units, sum_w, sum_w2],
    ).fetchone()
    assert phi == pytest.approx(dl.q / units, rel=1e-9)
    assert tau2 == pytest.approx(dl.tau2, rel=1e-9)


def test_tau2_is_zero_when_units_vary_less_than_chance():
    # Oracle: statsmodels combine_effects(method_re="dl") returns the moment estimate untruncated (negative here:
    # Q < I - 1); DerSimonian and Laird, and Spiegelhalter 2005 (from memory), take max(0, .). The limits are
    # then the binomial ones.
    units = [Unit(f"Ward {i}", "ward", x, 200) for i, x in enumerate([20, 21, 19, 20, 22, 18])]
    con = build(units)
    dl = dersimonian_laird(units)
    got = rows(con)
    assert dl.tau2 < 0 and got[0]["tau2"] == 0.0
    assert got[0]["phi"] == pytest.approx(dl.q / len(units), rel=1e-9) and got[0]["phi"] < 1
    p0 = 120 / 1200
    assert got[0]["upper_95"] == pytest.approx(p0 + Z95 * np.sqrt(p0 * (1 - p0) / 200), rel=1e-12)
    assert got[0]["overdispersion_note"] == "tau2 0: limits not widened"


def test_winsorised_phi_and_tau2_match_scipy_winsorize():
    # Oracle: scipy.stats.mstats.winsorize(z, limits=(0.1, 0.1)) on the z-scores (20 units: 2 pulled in at each
    # end), then phi = mean of the squared winsorised z-scores and Spiegelhalter's tau^2 (formula written out in
    # spiegelhalter_tau2).
    con = build(TWENTY, winsorize_pct=10.0)
    _, z, variance = z_scores(TWENTY)
    zw = np.asarray(winsorize(z, limits=(0.1, 0.1)))
    assert int(np.sum(zw != z)) == 4  # the fixture does make winsorising matter
    got = rows(con)[0]
    assert got["phi"] == pytest.approx(float(np.mean(zw**2)), rel=1e-9)
    assert got["tau2"] == pytest.approx(spiegelhalter_tau2(zw, variance), rel=1e-9)
    assert got["phi"] < float(np.mean(z**2)) / 2  # the extreme four would otherwise dominate the estimate
    unwinsorised = rows(build(TWENTY, winsorize_pct=0.0))[0]
    assert unwinsorised["phi"] == pytest.approx(float(np.mean(z**2)), rel=1e-9)


@pytest.mark.parametrize("pct", [0.0, 5.0, 10.0, 12.5, 20.0, 25.0, 33.3, 49.9])
def test_winsorised_count_rounds_as_scipy(pct):
    # Oracle: scipy.stats.mstats.winsorize with inclusive limits: how many values it changes at each end of
    # 1..60 distinct values is winsorised_count(n, pct).
    con = duckdb.connect()
    install_macros(con)
    for n in range(1, 61):
        a = np.arange(n, dtype=float)
        w = np.asarray(winsorize(a, limits=(pct / 100, pct / 100)))
        raised, lowered = int(np.sum(w > a)), int(np.sum(w < a))
        got = con.execute("select winsorised_count(?, ?)", [n, pct]).fetchall()[0][0]
        assert (got, got) == (raised, lowered), n


def test_winsorising_in_sql_matches_scipy_with_tied_z_scores():
    # Oracle: scipy.stats.mstats.winsorize; ties at the cut (equal rates and volumes) must not change the result.
    units = [Unit(f"U{i:02d}", "ward", x, 100) for i, x in enumerate([5, 5, 5, 10, 12, 15, 15, 18, 30, 30, 30])]
    con = build(units, winsorize_pct=20.0)  # floor(2.2) = 2 at each end, inside the tied groups
    _, z, _ = z_scores(units)
    zw = np.asarray(winsorize(z, limits=(0.2, 0.2)))
    assert rows(con)[0]["phi"] == pytest.approx(float(np.mean(zw**2)), rel=1e-9)


# --------------------------------------------------------------------------------------
# Limits
# --------------------------------------------------------------------------------------


def test_limit_formula_hand_computed():
    # Hand-computed (Spiegelhalter 2005 formulas, from memory): p0 0.2, n 100 -> s^2 = 0.16 / 100 = 0.0016.
    #   additive, tau^2 0.0009: sqrt(0.0016 + 0.0009) = 0.05; 95 %: 0.2 -/+ 1.959964 x 0.05 = 0.102002, 0.297998
    #   multiplicative, phi 2.25: 0.04 x 1.5 = 0.06; 99.8 %: 0.2 + 3.090232 x 0.06 = 0.385414
    #   multiplicative, phi 0.64 (< 1): not narrowed, 0.2 + 1.959964 x 0.04 = 0.278399
    #   none: 0.2 - 3.090232 x 0.04 = 0.076391; p0 0.01, n 20: 0.01 - 1.959964 x 0.022249 < 0 -> 0
    con = duckdb.connect()
    install_macros(con)
    got = con.execute(
        "select funnel_lower_limit(0.2, 100, ?, 'additive', 1.0, 0.0009), "
        "funnel_upper_limit(0.2, 100, ?, 'additive', 1.0, 0.0009), "
        "funnel_upper_limit(0.2, 100, ?, 'multiplicative', 2.25), "
        "funnel_upper_limit(0.2, 100, ?, 'multiplicative', 0.64), "
        "funnel_lower_limit(0.2, 100, ?), funnel_lower_limit(0.01, 20, ?), "
        "funnel_upper_limit(0.2, 100, ?, 'multiplicative', null), funnel_upper_limit(0.2, 0, ?), "
        "funnel_sigma(0.2, 100, 'additive', 1.0, 0.0009)",
        [Z95, Z95, Z998, Z95, Z998, Z95, Z95, Z95],
    ).fetchall()[0]
    assert got[:6] == pytest.approx((0.102002, 0.297998, 0.385414, 0.278399, 0.076391, 0.0), abs=1e-6)
    assert got[6:8] == (None, None)  # no estimate, no volume: no limit (not the 0 or 1 bound)
    assert got[8] == pytest.approx(0.05, abs=1e-12)


def test_none_reproduces_the_binomial_normal_approximation():
    # Oracle: scipy.stats.norm.ppf for the quantiles; limits p0 -/+ z sqrt(p0 (1 - p0) / n), clipped to [0, 1]
    # (the funnel plot before over-dispersion was allowed for). phi and tau2 are still reported, not applied.
    con = build(SPREAD, overdispersion="none")
    p0, _, variance = z_scores(SPREAD)
    for r, u, v in zip(sorted(rows(con), key=lambda r: r["unit"]), SPREAD, variance, strict=True):
        assert r["unit"] == u.name and r["overdispersion"] == "none"
        s = np.sqrt(v)
        assert r["lower_95"] == pytest.approx(max(0.0, p0 - Z95 * s), rel=1e-12)
        assert r["upper_95"] == pytest.approx(min(1.0, p0 + Z95 * s), rel=1e-12)
        assert r["lower_998"] == pytest.approx(max(0.0, p0 - Z998 * s), rel=1e-12)
        assert r["upper_998"] == pytest.approx(min(1.0, p0 + Z998 * s), rel=1e-12)
        assert r["phi"] > 1 and r["tau2"] > 0
        assert r["overdispersion_note"] == "over-dispersion estimated but not applied (setting none)"


@pytest.mark.parametrize("method", ["additive", "multiplicative"])
def test_limits_widen_as_the_method_says(method):
    # Spiegelhalter 2005 (from memory): additive p0 -/+ z sqrt(s^2 + tau^2); multiplicative p0 -/+ z sqrt(phi) s.
    con = build(SPREAD, overdispersion=method)
    p0, _, variance = z_scores(SPREAD)
    got = sorted(rows(con), key=lambda r: r["unit"])
    phi, tau2 = got[0]["phi"], got[0]["tau2"]
    for r, v in zip(got, variance, strict=True):
        s = float(np.sqrt(v * phi) if method == "multiplicative" else np.sqrt(v + tau2))
        assert r["overdispersion"] == method
        assert r["lower_998"] == pytest.approx(max(0.0, p0 - Z998 * s), rel=1e-12)
        assert r["upper_998"] == pytest.approx(min(1.0, p0 + Z998 * s), rel=1e-12)
        position = (
            "above 99.8 % limit" if r["rate"] > r["upper_998"] else
            "above 95 % limit" if r["rate"] > r["upper_95"] else
            "below 99.8 % limit" if r["rate"] < r["lower_998"] else
            "below 95 % limit" if r["rate"] < r["lower_95"] else "within limits"
        )  # fmt: skip
        assert r["position"] == position
    binomial = {r["unit"]: r for r in rows(build(SPREAD, overdispersion="none"))}
    outside = [r for r in got if r["position"] != "within limits"]
    assert len(outside) < sum(1 for r in binomial.values() if r["position"] != "within limits")


def test_fewer_than_five_units_are_not_estimated():
    # The SQL comment's minimum (5 units with counts shown): 4 over-dispersed wards get binomial limits and say so.
    con = build(SPREAD[:4], overdispersion="additive")
    p0, _, variance = z_scores(SPREAD[:4])
    for r, v in zip(sorted(rows(con), key=lambda r: r["unit"]), variance, strict=True):
        assert (r["overdispersion"], r["phi"], r["tau2"], r["units_in_estimate"]) == ("none", None, None, 4)
        assert r["overdispersion_note"].startswith("fewer than 5 units of this type")
        assert r["upper_95"] == pytest.approx(p0 + Z95 * np.sqrt(v), rel=1e-12)
    assert {r["overdispersion"] for r in rows(build(SPREAD[:5]))} == {"additive"}


# --------------------------------------------------------------------------------------
# Centre line per unit type
# --------------------------------------------------------------------------------------

# Intensive care units sample sicker patients: a rate near 30 % is usual there and unusual on a ward.
TWO_TYPES = SPREAD[:6] + [
    Unit(f"ICU {i}", "intensive_care", x, n)
    for i, (x, n) in enumerate([(60, 200), (75, 240), (50, 180), (90, 280), (66, 210), (36, 100)], start=1)
]


def test_each_unit_is_compared_with_its_own_type():
    con = build(TWO_TYPES)
    got = by_unit(con)
    # hand-counted: wards 161 / 1395, intensive care 377 / 1210
    assert [got[f"Ward {c}"]["overall_rate"] for c in "ABCDEF"] == pytest.approx([161 / 1395] * 6, rel=1e-12)
    assert [got[f"ICU {i}"]["overall_rate"] for i in range(1, 7)] == pytest.approx([377 / 1210] * 6, rel=1e-12)
    assert {r["units_in_type"] for r in got.values()} == {6}
    # each type's estimate is its own (the same oracle as above, per type)
    for unit_type in ("ward", "intensive_care"):
        members = [u for u in TWO_TYPES if u.unit_type == unit_type]
        dl = dersimonian_laird(members)
        assert got[members[0].name]["tau2"] == pytest.approx(max(0.0, dl.tau2), rel=1e-9, abs=1e-15)
    # an ICU at 36 % sits inside its own funnel (type rate 31.2 %); against the site's pooled 20.7 % it would be
    # above the 99.8 % limit
    icu = got["ICU 6"]
    assert icu["position"] == "within limits"
    site = 538 / 2605
    assert icu["rate"] > site + Z998 * np.sqrt(site * (1 - site) / 100)


def test_one_type_only_uses_the_site_rate_as_its_centre():
    # audit_cell has no unit-type level when every unit has the same type (10_audit_cell.sql): the site row is
    # that type's total; the result must not depend on which of the two the table holds.
    with_level = rows(build(SPREAD, type_level=True))
    without = rows(build(SPREAD, type_level=False))
    assert without == with_level
    assert without[0]["overall_rate"] == pytest.approx(sum(u.x for u in SPREAD) / sum(u.n for u in SPREAD))


def test_curve_per_type_is_widened_like_the_units():
    con = build(TWO_TYPES)
    curve = rows(con, "audit_funnel_curve")
    funnel = by_unit(con)
    assert {r["unit_type"] for r in curve} == {"ward", "intensive_care"}
    for unit_type in ("ward", "intensive_care"):
        members = [u for u in TWO_TYPES if u.unit_type == unit_type]
        lines = [r for r in curve if r["unit_type"] == unit_type]
        estimate = funnel[members[0].name]
        assert 50 <= len(lines) <= 60  # 60 grid points, a few merged by rounding to whole samples
        # ends of the grid: half the smallest and 1.2 x the largest volume, to the sample (exp(ln) may fall
        # either side of a half)
        assert lines[0]["volume"] == pytest.approx(min(u.n for u in members) / 2, abs=1)
        assert lines[-1]["volume"] == pytest.approx(1.2 * max(u.n for u in members), abs=1)
        for r in lines:
            assert (r["overall_rate"], r["tau2"], r["overdispersion"]) == (
                estimate["overall_rate"],
                estimate["tau2"],
                "additive",
            )
            p0 = r["overall_rate"]
            s = np.sqrt(p0 * (1 - p0) / r["volume"] + r["tau2"])  # Spiegelhalter 2005 additive limits
            assert r["lower_95"] == pytest.approx(max(0.0, p0 - Z95 * s), rel=1e-12)
            assert r["upper_998"] == pytest.approx(min(1.0, p0 + Z998 * s), rel=1e-12)


# --------------------------------------------------------------------------------------
# Suppression
# --------------------------------------------------------------------------------------


def published(con: duckdb.DuckDBPyConnection) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    return rows(con), rows(con, "audit_funnel_curve")


def test_hidden_counts_stay_hidden_and_give_nothing_away():
    # Wards B and E have hidden numerators (complementary suppression hides at least two in the type's line).
    # Moving one sample from B's numerator to E's keeps every shown count, the type's total included: nothing
    # published may change, or the estimate would tell the two apart.
    hidden = [("Ward B", "ward", "num"), ("Ward E", "ward", "num")]
    before = build(SPREAD, hidden=hidden)
    moved = [dataclasses.replace(u, x=u.x + {"Ward B": -1, "Ward E": 1}.get(u.name, 0)) for u in SPREAD]
    after = build(moved, hidden=hidden)
    assert published(before) == published(after)
    got = by_unit(before)
    for name in ("Ward B", "Ward E"):
        assert (got[name]["numerator"], got[name]["rate"], got[name]["position"]) == (None, None, None)
        assert got[name]["denominator"] is not None and got[name]["upper_95"] is not None  # its own n is shown
        assert got[name]["suppressed_columns"] == "numerator, rate, position"
    # the estimate is that of the ten shown wards around the type's (shown) rate: hand formula, numpy
    _, z, variance = z_scores(SPREAD)
    shown = np.array([u.name not in ("Ward B", "Ward E") for u in SPREAD])
    assert got["Ward A"]["units_in_estimate"] == 10 and got["Ward A"]["units_in_type"] == 12
    zw = np.asarray(winsorize(z[shown], limits=(0.1, 0.1)))  # scipy oracle: 1 pulled in at each end
    assert got["Ward A"]["phi"] == pytest.approx(float(np.mean(zw**2)), rel=1e-9)
    assert got["Ward A"]["tau2"] == pytest.approx(spiegelhalter_tau2(zw, variance[shown]), rel=1e-9)


def test_a_hidden_type_rate_hides_its_centre_limits_and_estimate():
    con = build(TWO_TYPES, hidden=[(None, "intensive_care", "num")])
    got = by_unit(con)
    for i in range(1, 7):
        r = got[f"ICU {i}"]
        assert r["rate"] is not None  # the unit's own counts are shown
        assert [r[c] for c in ("overall_rate", "phi", "tau2", "lower_95", "upper_998", "position")] == [None] * 6
        assert r["suppressed_columns"] == "overall_rate, phi, tau2, lower_95, upper_95, lower_998, upper_998, position"
        assert r["overdispersion"] == "none"
    assert got["Ward A"]["overall_rate"] is not None and got["Ward A"]["phi"] is not None
    assert {r["unit_type"] for r in rows(con, "audit_funnel_curve")} == {"ward"}


def test_a_hidden_denominator_hides_the_units_limits():
    con = build(SPREAD, hidden=[("Ward C", "ward", "den"), ("Ward K", "ward", "den")])
    r = by_unit(con)["Ward C"]
    assert [r[c] for c in ("denominator", "rate", "lower_95", "upper_998", "position")] == [None] * 5
    assert r["units_in_estimate"] == 10
    curve = rows(con, "audit_funnel_curve")
    assert curve[0]["volume"] == pytest.approx(
        min(u.n for u in SPREAD if u.name not in ("Ward C", "Ward K")) / 2, abs=1
    )


# --------------------------------------------------------------------------------------
# Through the audit stage
# --------------------------------------------------------------------------------------


def samples(units: list[Unit], start: datetime) -> list[dict[str, Any]]:
    """Room-air samples, one patient each: x of each unit's n hypoxaemic (PaO2 55 mmHg, no saturation), the rest in
    target (PaO2 90 mmHg, SaO2 96.9 %), all in one complete month."""
    rows = []
    for u in units:
        for i in range(u.n):
            hypo = i < u.x
            when = start + timedelta(minutes=5 * len(rows))
            rows.append(
                record(
                    f"{u.name}-{i}",
                    unit=u.name,
                    patient_id=f"{u.name}-{i}",
                    collected_at=when,
                    resulted_at=when + timedelta(minutes=10),
                    pao2_mmhg=55.0 if hypo else 90.0,
                    sao2_pct=None if hypo else 96.9,
                    spo2_pct=None if hypo else 97.0,
                )
            )
    return rows


def test_audit_stage_compares_units_within_their_configured_types(tmp_path):
    # Six wards (invented counts) and two intensive care units from the site's [unit_types]; the last sample is in
    # the next month so that January is complete. Oracles as above: statsmodels DerSimonian-Laird for the wards,
    # the 5-unit minimum for intensive care; the centre lines are the type rows audit_rates publishes.
    wards = [Unit(f"Ward {c}", "ward", x, n) for c, (x, n) in zip("ABCDEF", [(6, 60), (20, 80), (3, 50),
             (25, 90), (9, 70), (2, 40)], strict=True)]  # fmt: skip
    icus = [Unit("Heron ICU", "critical_care", 30, 70), Unit("Kite ICU", "critical_care", 22, 60)]
    rows = samples(wards + icus, datetime(2026, 1, 5, 8, 0)) + samples(
        [Unit("Ward A", "ward", 0, 1)], datetime(2026, 2, 2, 8, 0)
    )
    rows[-1]["sample_id"] = rows[-1]["patient_id"] = "FEB-1"
    config = dataclasses.replace(
        audit_config(tmp_path, k=1, complete_periods_only=True),
        unit_types={u.name: u.unit_type for u in wards + icus},
    )
    con = build_store(tmp_path, rows, config)
    audit(con, config)
    funnel = {r["unit"]: r for r in frame(con, "audit_funnel", "measure = 'hypoxaemia'").to_dicts()}
    assert {name: (r["numerator"], r["denominator"]) for name, r in funnel.items()} == {
        u.name: (u.x, u.n) for u in wards + icus
    }  # hand-counted fixture reaches the funnel intact
    type_rates = {
        r["unit_type"]: r["rate"]
        for r in frame(con, "audit_rates", "measure = 'hypoxaemia' and all_units and all_periods").to_dicts()
    }
    assert funnel["Ward A"]["overall_rate"] == pytest.approx(type_rates["ward"]) == pytest.approx(65 / 390)
    assert funnel["Heron ICU"]["overall_rate"] == pytest.approx(type_rates["critical_care"])
    dl = dersimonian_laird(wards)
    ward = funnel["Ward B"]
    assert (ward["overdispersion"], ward["units_in_type"], ward["units_in_estimate"]) == ("additive", 6, 6)
    assert ward["phi"] == pytest.approx(dl.q / 6, rel=1e-9)
    assert ward["tau2"] == pytest.approx(max(0.0, dl.tau2), rel=1e-9) and ward["tau2"] > 0
    icu = funnel["Kite ICU"]
    assert (icu["overdispersion"], icu["phi"], icu["units_in_type"]) == ("none", None, 2)
    curve = frame(con, "audit_funnel_curve", "measure = 'hypoxaemia'")
    assert set(curve["unit_type"].to_list()) == {"ward", "critical_care"}
    con.close()
