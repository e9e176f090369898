"""The audit stage: derived metrics feeding it, rates on a hand-counted dataset, the
statistics macros against their oracle and check values, control-chart signals, and
small-cell suppression (no small count shown, none recoverable from a total).

Check values name their source: "domain notes" are the project's reference sheet, which
quotes the publication; statsmodels is the independent oracle for Wilson intervals.
"""

from __future__ import annotations

import dataclasses
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import polars as pl
import pytest
from statsmodels.stats.proportion import proportion_confint
from threadpoolctl import threadpool_limits

from pipeline.audit_settings import AuditSettings, parse_audit_settings
from pipeline.errors import ConfigError
from pipeline.sql_files import install_macros, run_sql
from synthetic_data import generate
from tests.audit_store import (
    JAN,
    RUN_ID,
    audit,
    audit_config,
    build_store,
    frame,
    oxygen_store,
)
from tests.rule_harness import record

FEB = datetime(2026, 2, 9, 9, 0)


@pytest.fixture(scope="module")
def macros() -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    install_macros(con)
    yield con
    con.close()


def one(con: duckdb.DuckDBPyConnection, sql: str, params: list[Any] | None = None) -> Any:
    return con.execute(sql, params or []).fetchall()[0][0]


# --------------------------------------------------------------------------------------
# Statistics macros
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("x", "n", "low", "high"),
    # Wilson 1927 check values from the domain notes (section 13), tolerance 1e-4.
    [(5, 20, 0.1119, 0.4687), (0, 10, 0.0, 0.2775), (50, 100, 0.4038, 0.5962), (1, 1000, 0.00018, 0.00564)],
)
def test_wilson_check_values(macros, x, n, low, high):
    got = macros.execute("select wilson_lower(?, ?), wilson_upper(?, ?)", [x, n, x, n]).fetchall()[0]
    assert got == pytest.approx((low, high), abs=1e-4)


def test_wilson_matches_statsmodels_oracle(macros):
    # Oracle: statsmodels proportion_confint(method='wilson'), alpha 0.05, over every x of several n.
    cases = [
        (x, n) for n in (1, 2, 3, 7, 10, 11, 20, 57, 100, 333, 1000, 5000) for x in range(0, n + 1, max(1, n // 23))
    ]
    cases += [(n, n) for n in (1, 7, 1000)]
    con = macros
    frame_ = pl.DataFrame({"x": [c[0] for c in cases], "n": [c[1] for c in cases]})
    con.register("cases", frame_)
    got = con.execute("select wilson_lower(x, n), wilson_upper(x, n) from cases").fetchall()
    con.unregister("cases")
    for (x, n), (low, high) in zip(cases, got, strict=True):
        want_low, want_high = proportion_confint(x, n, alpha=0.05, method="wilson")
        assert low == pytest.approx(want_low, abs=1e-12), (x, n)
        assert high == pytest.approx(want_high, abs=1e-12), (x, n)


def test_wilson_is_null_outside_its_domain(macros):
    assert macros.execute("select wilson_lower(1, 0), wilson_upper(5, 4), wilson_lower(-1, 4)").fetchall() == [
        (None, None, None)
    ]


@pytest.mark.parametrize(
    ("p_bar", "n", "lcl", "ucl"),
    # p-chart check values from the domain notes (section 13): p 0.10, n 50 -> LCL -0.0273 clipped to 0,
    # UCL 0.2273; n 200 -> 0.0364, 0.1636.
    [(0.10, 50, 0.0, 0.2273), (0.10, 200, 0.0364, 0.1636)],
)
def test_p_chart_limits_check_values(macros, p_bar, n, lcl, ucl):
    got = macros.execute("select proportion_lower_limit(?, ?), proportion_upper_limit(?, ?)", [p_bar, n, p_bar, n])
    assert got.fetchall()[0] == pytest.approx((lcl, ucl), abs=1e-4)


def test_funnel_limits_use_the_normal_quantiles(macros):
    # 95 % and 99.8 % two-sided quantiles 1.959964 and 3.090232 (scipy.stats.norm.ppf(0.975 / 0.999), from memory):
    # p 0.10, n 400 -> sigma 0.015; 0.10 +/- 0.029399 and +/- 0.046353.
    low95, high998 = macros.execute(
        "select proportion_lower_limit(0.1, 400, 1.959963984540054), "
        "proportion_upper_limit(0.1, 400, 3.090232306167813)"
    ).fetchall()[0]
    assert low95 == pytest.approx(0.1 - 0.029399, abs=1e-6)
    assert high998 == pytest.approx(0.1 + 0.046353, abs=1e-6)


def test_laney_building_blocks(macros):
    # Domain notes section 13 (Laney 2002): sigma at p 0.10, n 100 = sqrt(0.09 / 100) = 0.03 (binomial);
    # z = (0.13 - 0.10) / 0.03 = 1; mean moving range 2.5079 -> sigma_z 2.5079 / 1.128 = 2.2233.
    got = macros.execute(
        "select binomial_sigma(0.1, 100), standardised_proportion(0.13, 0.1, 100), laney_sigma_z(2.5079), "
        "standardised_proportion(0.5, 0.0, 100), proportion_upper_limit(0.1, 200, 3.0, NULL)"
    ).fetchall()[0]
    assert got[:3] == pytest.approx((0.03, 1.0, 2.2233), abs=1e-4)
    assert got[3:] == (None, None)  # no spread around p_bar 0; a missing scale is not a zero scale


def test_small_cell_rule(macros):
    # US CMS cell size suppression policy: no cell 1-10 (threshold 11); 0 is allowed.
    got = macros.execute(
        "select is_small_cell(0, 11), is_small_cell(1, 11), is_small_cell(10, 11), is_small_cell(11, 11)"
    )
    assert got.fetchall()[0] == (False, True, True, False)


# --------------------------------------------------------------------------------------
# A hand-counted dataset: two units, two months
# --------------------------------------------------------------------------------------


def hand_rows() -> list[dict[str, Any]]:
    """Ward A in January 2026 and Ward B in February 2026; every count below is by hand."""
    quiet = {"sao2_pct": None, "spo2_pct": None}  # no saturation: the dissociation and venous rules stay silent
    rows: list[dict[str, Any]] = []

    def add(prefix: str, count: int, when: datetime, unit: str, patient_id: str | None = None, **changes: Any) -> None:
        for i in range(count):
            n = len(rows)
            rows.append(
                record(
                    f"{prefix}{i}",
                    unit=unit,
                    collected_at=when + timedelta(minutes=n),
                    resulted_at=when + timedelta(minutes=n + 10),
                    patient_id=patient_id or f"MRN-{unit[-1]}-{n:04d}",
                    **changes,
                )
            )

    for pair in range(5):  # 10 clean room-air samples, 2 per patient -> 5 patients
        add(f"A-CLEAN{pair}-", 2, JAN + timedelta(hours=pair), "Ward A", patient_id=f"MRN-A-PAIR{pair}")
    # Hypoxaemic on room air: PaO2 55 < 60 mmHg; A-a 99.73 - 55 = 44.7 > age/4 + 4 = 14 (age 40).
    add("A-HYPO", 3, JAN + timedelta(days=1), "Ward A", pao2_mmhg=55.0, **quiet)
    # Nasal cannula 2 L/min, FiO2 0.28, PaO2 120: hyperoxaemic (> 100 on oxygen) and predicted saturation
    # 98.7 % (Severinghaus) above 98 %; P/F 428.6 (above 300).
    add(
        "A-HYPER",
        4,
        JAN + timedelta(days=2),
        "Ward A",
        o2_device="nasal_cannula",
        o2_flow_l_min=2.0,
        fio2=0.28,
        pao2_mmhg=120.0,
        **quiet,
    )
    # Simple mask FiO2 0.40, PaO2 80: P/F 200 is moderate (a boundary belongs to the lower band, Berlin 2012);
    # predicted saturation 95.7 % in the 94-98 % target.
    add(
        "A-MASK",
        2,
        JAN + timedelta(days=3),
        "Ward A",
        o2_device="simple_mask",
        o2_flow_l_min=6.0,
        fio2=0.40,
        pao2_mmhg=80.0,
        **quiet,
    )
    # Nasal cannula 2 L/min cannot deliver FiO2 0.80 (fio2_outside_device_range, medium severity: included with
    # caution, since only high-severity findings exclude); SaO2 96.9 % in target, P/F 90 / 0.80 = 112.5 moderate.
    add("A-MISMATCH", 1, JAN + timedelta(days=4), "Ward A", o2_device="nasal_cannula", o2_flow_l_min=2.0, fio2=0.80)
    add("A-VENOUS", 1, JAN + timedelta(days=5), "Ward A", sample_type="venous")  # excluded: sample type
    # FiO2 and device not documented, PaO2 90 within room air: oxygen status unknown
    add("A-NODOC", 1, JAN + timedelta(days=6), "Ward A", fio2=None, o2_device=None)
    add("B-CLEAN", 5, FEB, "Ward B")
    add("B-HYPO", 5, FEB + timedelta(days=1), "Ward B", pao2_mmhg=55.0, **quiet)
    return rows


@pytest.fixture(scope="module")
def hand_store(tmp_path_factory) -> duckdb.DuckDBPyConnection:
    tmp = tmp_path_factory.mktemp("hand")
    config = audit_config(tmp, k=1, complete_periods_only=False)  # k = 1: nothing is small, every count shown
    con = build_store(tmp, hand_rows(), config)
    audit(con, config)
    yield con
    con.close()


def test_hand_dataset_has_only_the_intended_data_quality_flags(hand_store):
    flags = hand_store.execute(
        "select rule_id, count(*) from flags where kind in ('data_quality', 'documentation') group by all order by 1"
    ).fetchall()
    assert flags == [("fio2_outside_device_range", 1), ("oxygen_documentation_missing", 1)]


def test_derived_columns_on_hand_computed_records(hand_store):
    rows = {
        r["sample_id"]: r
        for r in frame(
            hand_store, "derived", "sample_id in ('A-CLEAN0-0', 'A-HYPO0', 'A-MASK0', 'A-HYPER0')"
        ).to_dicts()
    }
    clean = rows["A-CLEAN0-0"]
    # Domain notes sections 1, 3, 4: PiO2 0.21 x 713 = 149.73; PAO2 (simplified, R 0.8) 149.73 - 40 / 0.8 = 99.73;
    # A-a 99.73 - 90 = 9.73; a/A 90 / 99.73 = 0.9024; expected A-a age/4 + 4 = 14 at 40 (common practice).
    assert clean["inspired_po2_mmhg"] == pytest.approx(149.73, abs=0.01)
    assert clean["pao2_alveolar_mmhg"] == pytest.approx(99.73, abs=0.01)
    assert clean["aa_gradient_mmhg"] == pytest.approx(9.73, abs=0.01)
    assert clean["aa_gradient_expected_mmhg"] == pytest.approx(14.0)
    assert clean["aa_gradient_excess_mmhg"] == pytest.approx(-4.27, abs=0.01)
    assert clean["a_over_a_ratio"] == pytest.approx(0.9024, abs=1e-4)
    # P/F 90 / 0.21 = 428.6, above 300 (Berlin 2012); S/F only for SpO2 <= 97 %: 97 / 0.21 = 461.9.
    assert clean["pf_ratio"] == pytest.approx(428.57, abs=0.01)
    assert clean["pf_band"] == "none"
    assert clean["sf_ratio"] == pytest.approx(461.9, abs=0.1)
    # pH 7.40, PaCO2 40, HCO3 24.5: Henderson-Hasselbalch (pK' 6.1) gives 7.3999 (domain notes section 6).
    assert clean["acid_base_residual"] == pytest.approx(0.0, abs=0.002)
    assert clean["on_supplemental_oxygen"] is False
    assert (clean["target_low_pct"], clean["target_high_pct"]) == (94.0, 98.0)  # BTS 2017
    assert clean["oxygen_status"] == "in_target"

    hypo = rows["A-HYPO0"]
    assert hypo["oxygen_status"] == "hypoxaemic"  # PaO2 55 < 60 mmHg (common practice)
    assert hypo["pf_band"] == "mild"  # 55 / 0.21 = 261.9
    mask = rows["A-MASK0"]
    assert mask["pf_ratio"] == pytest.approx(200.0)
    assert mask["pf_band"] == "moderate"  # 200 belongs to the lower band (domain notes section 4)
    assert mask["on_supplemental_oxygen"] is True
    # Severinghaus 1979 at PaO2 80: 95.73 % (domain notes section 5 check value), within 94-98 %.
    assert mask["predicted_sao2_pct"] == pytest.approx(95.73, abs=0.01)
    assert mask["oxygen_status"] == "in_target"
    hyper = rows["A-HYPER0"]
    assert hyper["oxygen_status"] == "hyperoxaemic"  # PaO2 120 > 100 mmHg on oxygen
    assert hyper["arterial_saturation_pct"] > 98.0


def test_volume_counts_by_hand(hand_store):
    v = {(r["unit"], r["period"]): r for r in frame(hand_store, "audit_volume").to_dicts()}
    a = v[("Ward A", "2026-01")]
    # 10 + 3 + 4 + 2 + 1 + 1 + 1 = 22 samples; patients 5 (pairs) + 12 singles = 17.
    assert (a["samples"], a["patients"]) == (22, 17)
    # the mismatch is included with caution (medium severity); only the venous sample is excluded
    assert (a["samples_usable"], a["samples_caution"], a["samples_excluded"]) == (20, 1, 1)
    assert (a["excluded_sample_type"], a["excluded_data_quality"]) == (1, 0)
    assert v[("Ward B", "2026-02")]["samples"] == 10
    total = v[("All units", "all periods")]
    assert (total["samples"], total["patients"], total["samples_excluded"]) == (32, 27, 1)
    assert ("Ward B", "2026-01") not in v  # no sample, no row
    assert all(r["suppressed_columns"] is None for r in v.values())


RATES_BY_HAND = {
    # (measure, unit, period): (numerator, denominator)
    ("fio2_device_documented", "Ward A", "2026-01"): (20, 21),  # 21 arterial, one without FiO2 and device
    ("fio2_device_mismatch", "Ward A", "2026-01"): (1, 20),
    # 21 included adult arterial samples with a PaO2 and a target (every arterial one, the mismatch with caution
    # and the undocumented one, whose status is 'oxygen_unknown', included)
    ("hypoxaemia", "Ward A", "2026-01"): (3, 21),
    ("oxygen_status_unknown", "Ward A", "2026-01"): (1, 21),  # A-NODOC
    # 4 cannula + 2 mask + the mismatch (cannula, FiO2 0.80) on documented oxygen; the other 14 not
    ("above_target_on_oxygen", "Ward A", "2026-01"): (4, 7),
    ("hyperoxaemia_on_oxygen", "Ward A", "2026-01"): (4, 7),
    ("undocumented_oxygen", "Ward A", "2026-01"): (0, 14),  # 10 clean + 3 hypoxaemic + A-NODOC; none above room air
    ("aa_above_age_limit", "Ward A", "2026-01"): (3, 13),  # room air with FiO2: 10 clean + 3 hypoxaemic
    ("hypoxaemia", "Ward B", "2026-02"): (5, 10),
    ("above_target_on_oxygen", "Ward B", "2026-02"): (0, 0),
    ("hypoxaemia", "All units", "all periods"): (8, 31),
    ("hypoxaemia", "Ward A", "all periods"): (3, 21),
    ("hypoxaemia", "All units", "2026-02"): (5, 10),
}


def test_rates_by_hand_with_wilson_intervals(hand_store):
    rates = {(r["measure"], r["unit"], r["period"]): r for r in frame(hand_store, "audit_rates").to_dicts()}
    for key, (x, n) in RATES_BY_HAND.items():
        row = rates[key]
        assert (row["numerator"], row["denominator"]) == (x, n), key
        if n == 0:
            assert row["rate"] is None and row["suppressed_columns"] is None
            continue
        low, high = proportion_confint(x, n, alpha=0.05, method="wilson")  # oracle: statsmodels
        assert row["rate"] == pytest.approx(x / n)
        assert (row["ci_low"], row["ci_high"]) == pytest.approx((low, high), abs=1e-12)


def test_pf_bands_and_flag_rates_by_hand(hand_store):
    bands = {
        r["band"]: r["samples_in_band"]
        for r in frame(hand_store, "audit_pf_bands", "unit = 'Ward A' and period = '2026-01'").to_dicts()
    }
    # 20 included samples with FiO2: room air 90/0.21 and cannula 120/0.28 above 300 (14), 55/0.21 mild (3),
    # mask 80/0.40 and the mismatch 90/0.80 moderate (3).
    assert bands == {"severe": 0, "moderate": 3, "mild": 3, "above_300": 14}
    flag = frame(
        hand_store,
        "audit_flag_rates",
        "rule_id = 'fio2_outside_device_range' and unit = 'Ward A' and period = '2026-01'",
    ).to_dicts()[0]
    assert (flag["flagged_samples"], flag["samples"]) == (1, 22)


def test_worklist_ranks_by_severity_then_recency_with_evidence(hand_store):
    rows = frame(hand_store, "review_worklist").sort("review_rank").to_dicts()
    assert [r["rule_id"] for r in rows] == ["fio2_outside_device_range"]  # documentation flags are not for the lab
    top = rows[0]
    assert top["sample_id"] == "A-MISMATCH0" and top["unit"] == "Ward A" and top["severity"] == "medium"
    assert "0.80" in top["evidence"] and "nasal cannula" in top["evidence"]
    assert top["rule_title"].startswith("Documented FiO2")
    assert top["patient_key"] and not top["patient_key"].startswith("MRN")
    assert "patient_id" not in rows[0]
    assert top["new_in_this_run"] is True


def test_worklist_order_and_window(tmp_path):
    # Two high and one medium flag: high first, latest collection first within a severity. High: resulted an
    # hour before it was collected (resulted_before_collected); medium: FiO2 0.33 is no Venturi setting.
    config = audit_config(tmp_path, k=1, complete_periods_only=False, worklist_days=0)
    rows = [
        record("OLD_HIGH", collected_at=JAN, resulted_at=JAN - timedelta(minutes=60)),
        record("NEW_HIGH", patient_id="P2", collected_at=FEB, resulted_at=FEB - timedelta(minutes=60)),
        record(
            "NEWEST_MEDIUM",
            patient_id="P3",
            o2_device="venturi_mask",
            fio2=0.33,
            collected_at=FEB + timedelta(days=3),
            resulted_at=FEB + timedelta(days=3, minutes=5),
        ),
    ]
    con = build_store(tmp_path, rows, config)
    audit(con, config)
    order = [r[0] for r in con.execute("select sample_id from review_worklist order by review_rank").fetchall()]
    assert order.index("NEW_HIGH") < order.index("OLD_HIGH") < order.index("NEWEST_MEDIUM")
    # The default window: samples collected in the 31 days up to the latest collection time.
    # OLD_HIGH (January) falls out, NEW_HIGH (3 days before the latest) stays, ranks unchanged.
    recent = dataclasses.replace(config, audit=dataclasses.replace(config.audit, worklist_days=31))
    audit(con, recent)
    ranked = con.execute("select sample_id, review_rank from review_worklist order by review_rank").fetchall()
    assert [r[0] for r in ranked] == [s for s in order if s != "OLD_HIGH"]
    assert [r[1] for r in ranked] == list(range(1, len(ranked) + 1))
    # A window of one day: only the latest day's samples.
    latest_day = dataclasses.replace(config, audit=dataclasses.replace(config.audit, worklist_days=1))
    audit(con, latest_day)
    assert {r[0] for r in con.execute("select sample_id from review_worklist").fetchall()} == {"NEWEST_MEDIUM"}
    con.close()


# --------------------------------------------------------------------------------------
# Age groups and oxygen statuses: a hand-counted store with derived rows set by hand
# --------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def o2_store(tmp_path_factory) -> duckdb.DuckDBPyConnection:
    con, _ = oxygen_store(tmp_path_factory.mktemp("oxygen"))
    yield con
    con.close()


def test_samples_by_age_group_by_hand(o2_store):
    # Groups G1-G9 and X1-X2 are adults (4+3+2+2+3+2+1+1+2+1+1 = 22), U1-U2 age unknown (3), C1-C2 children (5),
    # N1 neonates (2): 32 samples, and the groups add up to them.
    row = frame(o2_store, "audit_age_groups", "unit = 'Ward O' and period = '2026-01'").to_dicts()[0]
    assert (row["samples"], row["adults"], row["age_unknown"], row["children"], row["neonates"]) == (32, 22, 3, 5, 2)
    assert row["suppressed_columns"] is None
    total = frame(o2_store, "audit_age_groups", "all_units and all_periods").to_dicts()[0]
    assert (total["samples"], total["children"], total["neonates"]) == (32, 5, 2)
    volume = frame(o2_store, "audit_volume", "all_units and all_periods").to_dicts()[0]
    assert volume["samples"] == 32


# (measure): (numerator, denominator), counted by hand from OXYGEN_GROUPS. The denominators in words:
OXYGEN_RATES_BY_HAND = {
    # included adult (or age unknown) arterial samples with a PaO2 and a target that applies: G1-G8 (18) + U1-U2 (3)
    # = 21 (not G9: no target; not C, N: not adults; not X: excluded). Hypoxaemic: G2 (3) + U2 (1); G7 at 90 % on
    # an 88-92 % target is in target; C2 and X1 are hypoxaemic but a child and an excluded sample.
    "hypoxaemia": (4, 21),
    # the same 21; oxygen status unknown: G3 (2)
    "oxygen_status_unknown": (2, 21),
    # of the 21, those with no supplemental oxygen documented (nothing, or room air): G1 4 + G2 3 + G3 2 + G4 2 + U1 2
    # = 13; oxygen given but not documented: G4 (2)
    "undocumented_oxygen": (2, 13),
    # of the 21, those with supplemental oxygen documented: G5 3 + G6 2 + G7 1 + G8 1 + U2 1 = 8 (never G3 or G9);
    # saturation above the target's upper end: G5 (99.2 > 98) and G6 (99.6 > 98)
    "above_target_on_oxygen": (5, 8),
    "hyperoxaemia_on_oxygen": (2, 8),  # G6
    # included adults with an A-a excess whose PaO2 does not show undocumented oxygen: G1 4 + G2 3 = 7 (not G4,
    # not the child C1 nor the excluded X1, both +30); above the limit: G2 (3)
    "aa_above_age_limit": (3, 7),
}


def test_oxygen_rates_by_hand_with_wilson_intervals(o2_store):
    rows = frame(o2_store, "audit_rates", "unit = 'Ward O' and period = '2026-01'").to_dicts()
    rates = {r["measure"]: r for r in rows}
    for measure, (x, n) in OXYGEN_RATES_BY_HAND.items():
        row = rates[measure]
        assert (row["numerator"], row["denominator"]) == (x, n), measure
        low, high = proportion_confint(x, n, alpha=0.05, method="wilson")  # oracle: statsmodels
        assert row["rate"] == pytest.approx(x / n), measure
        assert (row["ci_low"], row["ci_high"]) == pytest.approx((low, high), abs=1e-12), measure
    # the two documentation denominators split the oxygenation denominator: 13 + 8 = 21
    assert rates["undocumented_oxygen"]["denominator"] + rates["above_target_on_oxygen"]["denominator"] == 21


def test_measure_definitions_state_their_denominators_in_words(o2_store):
    definitions = dict(o2_store.execute("select measure, definition from audit_rates group by all").fetchall())
    assert "no supplemental oxygen documented" in definitions["undocumented_oxygen"]
    assert "included adult arterial samples" in definitions["undocumented_oxygen"]
    assert "neither FiO2 nor an oxygen device documented" in definitions["oxygen_status_unknown"]
    hypoxaemia = definitions["hypoxaemia"]
    assert hypoxaemia.startswith(
        "arterial saturation below the lower end of the target range that applies and PaO2 < 60.0 mmHg"
    )
    assert "arterial saturation < 90.0 %" in hypoxaemia and "adult" in hypoxaemia
    for measure in ("above_target_on_oxygen", "hyperoxaemia_on_oxygen", "aa_above_age_limit"):
        assert "adult" in definitions[measure], measure


def test_unknown_and_unassessed_oxygen_status_never_count_in_or_above_target(o2_store):
    # Every sample whose oxygen status is 'oxygen_unknown' or 'not_assessed' (G3, G9, C1, N1: 9 samples) is in no
    # target numerator or denominator, although G3, G9 and C1 have saturations above 98 %.
    rows = o2_store.execute(
        "select f.sample_id, f.on_oxygen, f.above_target_on_oxygen, f.hyperoxaemic_on_oxygen "
        "from audit_sample_fact as f join derived as d using (sample_id) "
        "where d.oxygen_status in ('oxygen_unknown', 'not_assessed')"
    ).fetchall()
    assert len(rows) == 2 + 2 + 3 + 2
    assert all(not any(r[1:]) for r in rows), rows


def test_children_and_neonates_are_out_of_every_adult_rate(o2_store):
    # Children and neonates are in no oxygenation family (every count family of the layer except volume, status,
    # sample type, FiO2/device documentation and age group), so in no adult rate and no P/F band.
    counted = o2_store.sql(
        "select f.* from audit_sample_fact as f join derived as d using (sample_id) "
        "where d.age_group in ('child', 'neonate')"
    ).pl()
    assert counted.height == 5 + 2
    general = {"arterial", "fio2_device_documented", "fio2_device_mismatch"}
    oxygenation = [
        c
        for c, t in counted.schema.items()
        if t == pl.Boolean and c not in general and not c.startswith(("samples_", "excluded_", "age_"))
    ]
    assert {"oxygen_assessed", "on_oxygen", "no_oxygen_documented", "aa_assessed", "pf_assessed"} <= set(oxygenation)
    for family in oxygenation:
        assert not counted[family].any(), family
    # P/F bands among included adults: G1 4, G2 3, G5 3, G6 2, G7 1, G8 1, G9 2, U1 2, U2 1 = 19 with a band
    # (G3 has none; G4's FiO2 is contradicted by its PaO2; C1, C2, N1 are not adults; X1 is excluded).
    bands = {
        r["band"]: (r["samples_in_band"], r["samples_with_pf"])
        for r in frame(o2_store, "audit_pf_bands", "unit = 'Ward O' and period = '2026-01'").to_dicts()
    }
    assert bands == {"severe": (1, 19), "moderate": (2, 19), "mild": (3, 19), "above_300": (13, 19)}


def test_age_group_and_oxygen_splits_hold_with_suppression(tmp_path):
    # k 11 over three units and two months of the hand groups in different numbers: small age-group and oxygen
    # cells appear; none is shown, none is recoverable from its total, and the splits stay consistent.
    copies = {("Ward P", JAN): 1, ("Ward P", FEB): 4, ("Ward Q", JAN): 3, ("Ward Q", FEB): 1}
    copies |= {("Ward R", JAN): 5, ("Ward R", FEB): 2}
    con, _ = oxygen_store(tmp_path, [(unit, when, n) for (unit, when), n in copies.items()], k=11)
    assert check_suppression(con, 11) > 0
    assert determined_hidden_cells(con) == []
    ages = {(r["unit"], r["period"]): r for r in frame(con, "audit_age_groups").to_dicts()}
    # Ward P in January: 32 samples of which 2 neonates (small, hidden); the all-units total 32 x 16 = 512 is shown.
    assert ages[("Ward P", "2026-01")]["neonates"] is None
    assert "neonates" in ages[("Ward P", "2026-01")]["suppressed_columns"]
    total = ages[("All units", "all periods")]
    assert (total["samples"], total["adults"], total["age_unknown"], total["children"], total["neonates"]) == (
        32 * 16,
        22 * 16,
        3 * 16,
        5 * 16,
        2 * 16,
    )
    con.close()


# --------------------------------------------------------------------------------------
# Control charts
# --------------------------------------------------------------------------------------


def monthly_series(unit: str, xs: list[int], ns: list[int]) -> list[dict[str, Any]]:
    """One unit, month i: ns[i] room-air samples of which xs[i] hypoxaemic (PaO2 55)."""
    rows = []
    for month, (x, n) in enumerate(zip(xs, ns, strict=True)):
        start = datetime(2024 + month // 12, month % 12 + 1, 3, 8, 0)
        for i in range(n):
            hypo = i < x
            rows.append(
                record(
                    f"{unit}-{month}-{i}",
                    unit=unit,
                    patient_id=f"{unit}-{month}-{i}",
                    collected_at=start + timedelta(minutes=7 * i),
                    resulted_at=start + timedelta(minutes=7 * i + 10),
                    pao2_mmhg=55.0 if hypo else 90.0,
                    sao2_pct=None if hypo else 96.9,
                    spo2_pct=None if hypo else 97.0,
                )
            )
    return rows


LANEY_X = [30, 45, 28, 50, 33, 41]
LANEY_N = [300, 320, 310, 305, 295, 315]


@pytest.fixture(scope="module")
def chart_store(tmp_path_factory) -> tuple[duckdb.DuckDBPyConnection, Path]:
    tmp = tmp_path_factory.mktemp("chart")
    rows = (
        monthly_series("Laney", LANEY_X, LANEY_N)
        + monthly_series("Shift", [20] * 8 + [2, 2], [100] * 10)
        + monthly_series("Trend", [10, 12, 14, 16, 18, 20, 15], [100] * 7)
    )
    con = build_store(tmp, rows, audit_config(tmp, k=1, complete_periods_only=False))
    yield con, tmp
    con.close()


def charts(con: duckdb.DuckDBPyConnection, tmp: Path, **settings: Any) -> dict[str, list[dict[str, Any]]]:
    """Rebuild the audit with these settings (the period under way shown unless they say otherwise); the
    hypoxaemia p-chart points of every unit, in period order."""
    audit(con, audit_config(tmp, k=1, **{"complete_periods_only": False, **settings}))
    points = frame(con, "audit_control_chart", "measure = 'hypoxaemia'").sort("period_start").to_dicts()
    by_unit: dict[str, list[dict[str, Any]]] = {}
    for p in points:
        by_unit.setdefault(p["unit"], []).append(p)
    return by_unit


def chart(con: duckdb.DuckDBPyConnection, tmp: Path, unit: str, **settings: Any) -> list[dict[str, Any]]:
    return charts(con, tmp, **settings)[unit]


def test_laney_p_prime_check_values(chart_store):
    # Domain notes section 13 (Laney 2002): p_bar 0.12304, sigma_z 2.2233; subgroup 1 (n 300): Laney UCL 0.2495,
    # plain p-chart UCL 0.1799.
    points = chart(*chart_store, "Laney")
    assert [p["denominator"] for p in points] == LANEY_N
    first = points[0]
    assert first["centre"] == pytest.approx(0.12304, abs=1e-5)
    assert first["laney_sigma_z"] == pytest.approx(2.2233, abs=1e-4)
    assert first["laney_upper_limit"] == pytest.approx(0.2495, abs=1e-4)
    assert first["upper_limit"] == pytest.approx(0.1799, abs=1e-4)
    assert [p["rate"] for p in points] == pytest.approx([x / n for x, n in zip(LANEY_X, LANEY_N, strict=True)])


@pytest.mark.parametrize(("limits", "prefix"), [("p_chart", ""), ("laney", "laney_")])
def test_beyond_limits_uses_the_chosen_limits(chart_store, limits, prefix):
    by_unit = charts(*chart_store, chart_limits=limits)
    for points in by_unit.values():
        expected = [
            None if p["partial"] else p["rate"] < p[f"{prefix}lower_limit"] or p["rate"] > p[f"{prefix}upper_limit"]
            for p in points
        ]
        assert [p["beyond_limits"] for p in points] == expected
    assert by_unit["Shift"][-1]["partial"]  # the month under way is among the points, not judged


def test_shift_rule_needs_the_configured_run_length(chart_store):
    # 8 months at 0.20 then 2 at 0.02; the 10th (October 2024) is under way (the store's latest sample is on its
    # 3rd day): not judged and out of the centre, 162/900 = 0.18, so the first 8 points sit above it.
    points = chart(*chart_store, "Shift")
    assert [p["partial"] for p in points] == [False] * 9 + [True]
    assert [p["centre"] for p in points] == pytest.approx([0.18] * 10)
    assert {p["centre_basis"] for p in points} == {"complete periods"}
    assert [p["in_shift"] for p in points] == [True] * 8 + [False, None]
    assert "shift" in points[0]["signals"]
    assert [p["beyond_limits"] for p in points][-2:] == [True, None]  # 0.02 < LCL 0.18 - 3 x 0.0384 = 0.065
    assert not any(p["in_shift"] for p in chart(*chart_store, "Shift", shift_run=9))


def test_trend_rule_counts_points_not_steps(chart_store):
    # 10, 12, ..., 20 % then 15 %: six points each higher than the one before (five rises) form a trend of 6.
    points = chart(*chart_store, "Trend")
    assert [p["in_trend"] for p in points] == [True] * 6 + [False]
    assert not any(p["in_trend"] for p in chart(*chart_store, "Trend", trend_run=7))


# Hand-counted: 3 months at 2 % and 7 at 14 % (n 100 each, January-October 2024), then November under way with 3
# of 5 samples hypoxaemic. Complete periods: 104 / 1000 = 0.104; with November 107 / 1005.
PARTIAL_X = [2, 2, 2] + [14] * 7 + [3]
PARTIAL_N = [100] * 10 + [5]


def test_partial_period_is_drawn_but_not_judged_nor_in_the_centre(tmp_path):
    con = build_store(tmp_path, monthly_series("Ward P", PARTIAL_X, PARTIAL_N), audit_config(tmp_path, k=1))
    points = chart(con, tmp_path, "Ward P")
    assert [p["partial"] for p in points] == [False] * 10 + [True]
    under_way = points[-1]
    assert (under_way["period"], under_way["denominator"], under_way["rate"]) == ("2024-11", 5, pytest.approx(0.6))
    # judged, it would breach its limits (UCL 0.104 + 3 x sqrt(0.104 x 0.896 / 5) = 0.514) and complete a run of
    # 8 above the centre (the 7 months at 14 % and itself): its small n alone, so it is not judged
    assert under_way["rate"] > under_way["upper_limit"]
    assert [under_way[c] for c in ("beyond_limits", "in_shift", "in_trend", "signals")] == [None] * 4
    assert not any(p["in_shift"] for p in points[:-1])
    assert [p["centre"] for p in points] == pytest.approx([0.104] * 11)
    assert {p["centre_basis"] for p in points} == {"complete periods"}
    # the complete months are charted exactly as when the month under way is left out
    complete = chart(con, tmp_path, "Ward P", complete_periods_only=True)
    columns = ("period", "rate", "centre", "lower_limit", "upper_limit", "laney_sigma_z", "signals", "in_trend")
    assert [{c: p[c] for c in columns} for p in points[:-1]] == [{c: p[c] for c in columns} for p in complete]
    assert not any(p["partial"] for p in complete)
    con.close()


def test_partial_period_with_hidden_counts_keeps_the_published_centre(tmp_path):
    # k 5: November's 3 hypoxaemic samples (and the first three months' 2) are hidden. The complete periods' centre
    # would be 107 - 3 over 1005 - 5: publishing it would give November's hidden 3 away. The centre is then the
    # whole window's, as audit_rates publishes it, and says so; November is still not judged.
    config = audit_config(tmp_path, k=5)
    con = build_store(tmp_path, monthly_series("Ward P", PARTIAL_X, PARTIAL_N), config)
    audit(con, config)
    points = frame(con, "audit_control_chart", "measure = 'hypoxaemia' and unit = 'Ward P'").sort("period_start")
    points = points.to_dicts()
    assert points[-1]["partial"] and points[-1]["rate"] is None
    whole = frame(con, "audit_rates", "measure = 'hypoxaemia' and unit = 'Ward P' and all_periods").to_dicts()[0]
    assert whole["rate"] == pytest.approx(107 / 1005)
    assert {(p["centre"], p["centre_basis"]) for p in points} == {
        (whole["rate"], "all periods, the partial one included")
    }
    assert [p["beyond_limits"] for p in points][-1] is None
    assert all(p["beyond_limits"] is not None for p in points if p["rate"] is not None and not p["partial"])
    con.close()


# --------------------------------------------------------------------------------------
# Reporting window and settings
# --------------------------------------------------------------------------------------


def test_incomplete_latest_period_is_shown_as_partial_or_left_out(tmp_path):
    rows = [
        record("JAN", collected_at=JAN, resulted_at=JAN + timedelta(minutes=5)),
        record("FEB", patient_id="P2", collected_at=FEB, resulted_at=FEB + timedelta(minutes=5)),
    ]
    config = audit_config(tmp_path, k=1)
    con = build_store(tmp_path, rows, config)
    # by default the month under way (February: the latest sample is before its last day) is shown, marked
    audit(con, config)
    shown = frame(con, "audit_rates", "measure = 'hypoxaemia' and all_units").select("period", "partial_period")
    assert sorted(shown.rows()) == [("2026-01", False), ("2026-02", True), ("all periods", True)]
    audit(con, audit_config(tmp_path, k=1, complete_periods_only=True))
    assert frame(con, "audit_volume", "not all_periods")["period"].unique().to_list() == ["2026-01"]
    audit(con, audit_config(tmp_path, k=1, period="week"))
    assert sorted(frame(con, "audit_volume", "not all_periods")["period"].unique().to_list()) == [
        "2026-W03",
        "2026-W07",
    ]
    con.close()


def test_audit_settings_are_validated():
    assert parse_audit_settings({}) == AuditSettings()
    assert parse_audit_settings({"period": "week"}).history_periods == 52
    for bad in ({"period": "day"}, {"shift_run": 1}, {"sigma": 0}, {"colour": "red"}, {"complete_periods_only": "yes"}):
        with pytest.raises(ConfigError):
            parse_audit_settings(bad)


# --------------------------------------------------------------------------------------
# Small-cell suppression
# --------------------------------------------------------------------------------------

COUNT_COLUMNS = {
    "audit_volume": [
        "samples",
        "patients",
        "samples_usable",
        "samples_caution",
        "samples_excluded",
        "excluded_sample_type",
        "excluded_data_quality",
    ],
    "audit_rates": ["numerator", "denominator"],
    "audit_age_band_rates": ["numerator", "denominator"],
    "audit_pf_bands": ["samples_in_band", "samples_with_pf"],
    "audit_flag_rates": ["flagged_samples", "samples"],
    "audit_age_groups": ["samples", "adults", "age_unknown", "children", "neonates"],
    "audit_control_chart": ["denominator"],
    "audit_funnel": ["numerator", "denominator"],
}
PAIRS = {
    "audit_rates": ("numerator", "denominator"),
    "audit_age_band_rates": ("numerator", "denominator"),
    "audit_pf_bands": ("samples_in_band", "samples_with_pf"),
    "audit_flag_rates": ("flagged_samples", "samples"),
    "audit_funnel": ("numerator", "denominator"),
}
DERIVED = {
    "audit_rates": ["rate", "ci_low", "ci_high"],
    "audit_age_band_rates": ["rate", "ci_low", "ci_high"],
    "audit_pf_bands": ["share", "ci_low", "ci_high"],
    "audit_flag_rates": ["rate", "ci_low", "ci_high"],
    "audit_funnel": ["rate", "position"],
}
GROUP = {
    "audit_volume": [],
    "audit_rates": ["measure"],
    "audit_age_band_rates": ["measure", "age_band"],
    "audit_pf_bands": ["band"],
    "audit_flag_rates": ["rule_id"],
    "audit_age_groups": [],
}


def hidden(row: dict[str, Any], column: str) -> bool:
    return column in (row["suppressed_columns"] or "").split(", ")


# What each rate counts, from the measure definitions (sql/audit/05_audit_measure.sql): a reader who matches the
# definitions knows that two rates share a denominator, or that one rate's numerator is another's denominator.
RATE_COUNTS = {
    "fio2_device_documented": ("fio2_device_documented", "arterial"),
    "fio2_device_mismatch": ("fio2_device_mismatch", "fio2_device_documented"),
    "oxygen_status_unknown": ("oxygen_unknown", "oxygen_assessed"),
    "undocumented_oxygen": ("undocumented_oxygen", "no_oxygen_documented"),
    "hypoxaemia": ("hypoxaemic", "oxygen_assessed"),
    "above_target_on_oxygen": ("above_target_on_oxygen", "on_oxygen"),
    "hyperoxaemia_on_oxygen": ("hyperoxaemic_on_oxygen", "on_oxygen"),
    "aa_above_age_limit": ("aa_above_limit", "aa_assessed"),
    "on_oxygen_prescribed": ("rx_active", "rx_known"),
    "prescribed_target_documented": ("rx_with_target", "rx_known"),
    "within_prescribed_target": ("rx_within_target", "rx_target_assessed"),
    "above_prescribed_target": ("rx_above_target", "rx_target_assessed"),
    "below_prescribed_target": ("rx_below_target", "rx_target_assessed"),
    "oxygen_not_prescribed": ("rx_not_prescribed", "rx_known"),
    "prescribed_target_disagrees_with_risk": ("rx_target_conflicts_risk", "rx_risk_documented"),
    "episode_first_sample_hypoxaemic": ("episodes_first_hypoxaemic", "episodes"),
    "episode_any_hypoxaemia": ("episodes_any_hypoxaemic", "episodes"),
    "episode_any_above_target_on_oxygen": ("episodes_any_above_target", "episodes_on_oxygen"),
    "episode_any_out_of_target_on_oxygen": ("episodes_any_out_of_target", "episodes_on_oxygen"),
}


def count_key(table: str, column: str, r: dict[str, Any]) -> tuple[str, str, str]:
    """What a published count is, wherever it is shown: the same count in several tables or rows (the samples of
    a unit and period in the volume, age-group and flag tables; a P/F denominator on every band's row; a shared
    rate denominator) is one unknown to a reader, not several."""
    if table == "audit_rates":
        what = RATE_COUNTS[r["measure"]][0 if column == "numerator" else 1]
    elif table == "audit_age_band_rates":  # the same count of one adult age band
        what = RATE_COUNTS[r["measure"]][0 if column == "numerator" else 1] + "@" + r["age_band"]
    elif table == "audit_pf_bands":
        what = f"pf band {r['band']}" if column == "samples_in_band" else "pf_assessed"
    elif table == "audit_flag_rates":
        what = f"flag {r['rule_id']}" if column == "flagged_samples" else "samples"
    else:  # volume and age groups: the column names the count
        what = column
    return (what, r["unit"], r["period"])


def published_lines(con: duckdb.DuckDBPyConnection) -> list[tuple[str, list[tuple[Any, str, dict[str, Any]]]]]:
    """Every sum relation among published cells: (description, [(count key, column, row)...]) with the total
    first."""
    lines = []
    for table, group in GROUP.items():
        rows = frame(con, table).to_dicts()
        for column in COUNT_COLUMNS[table]:
            if column == "patients":
                continue  # distinct counts do not add up
            by_row: dict[tuple, list] = {}
            by_col: dict[tuple, list] = {}
            for r in rows:
                g = tuple(r[c] for c in group)
                by_row.setdefault((*g, r["unit"]), []).append(r)
                by_col.setdefault((*g, r["period"]), []).append(r)
            for name, members in by_row.items():  # one unit across periods; total: all periods
                members.sort(key=lambda r: not r["all_periods"])
                lines.append((f"{table}.{column} {name}", [(count_key(table, column, r), column, r) for r in members]))
            for name, members in by_col.items():  # one period across units; total: all units
                typed = [r for r in members if r["all_units"] and r["unit_type"] is not None]
                if not typed:
                    members.sort(key=lambda r: not r["all_units"])
                    lines.append(
                        (f"{table}.{column} {name}", [(count_key(table, column, r), column, r) for r in members])
                    )
                    continue
                # units within their type (total: all units of the type); types within the site
                for t in typed:
                    line = [t] + [r for r in members if not r["all_units"] and r["unit_type"] == t["unit_type"]]
                    keyed = [(count_key(table, column, r), column, r) for r in line]
                    lines.append((f"{table}.{column} {name} {t['unit']}", keyed))
                site = [r for r in members if r["all_units"] and r["unit_type"] is None]
                keyed = [(count_key(table, column, r), column, r) for r in site + typed]
                lines.append((f"{table}.{column} {name} types", keyed))
    volume = frame(con, "audit_volume").to_dicts()
    for r in volume:
        for parts in (
            ["samples", "samples_usable", "samples_caution", "samples_excluded"],
            ["samples_excluded", "excluded_sample_type", "excluded_data_quality"],
        ):
            split = [(count_key("audit_volume", c, r), c, r) for c in parts]
            lines.append((f"volume split {r['unit']} {r['period']} {parts[0]}", split))
    for r in frame(con, "audit_age_groups").to_dicts():
        parts = ["samples", "adults", "age_unknown", "children", "neonates"]
        members = [(count_key("audit_age_groups", c, r), c, r) for c in parts]
        lines.append((f"age groups {r['unit']} {r['period']}", members))
    # The oxygenation denominator (hypoxaemia) = no supplemental oxygen documented (undocumented oxygen)
    # + supplemental oxygen documented (above target on oxygen).
    by_measure: dict[tuple, dict[str, dict]] = {}
    for r in frame(con, "audit_rates").to_dicts():
        by_measure.setdefault((r["unit"], r["period"]), {})[r["measure"]] = r
    for key, measures in by_measure.items():
        split = [measures[m] for m in ("hypoxaemia", "undocumented_oxygen", "above_target_on_oxygen")]
        members = [(count_key("audit_rates", "denominator", r), "denominator", r) for r in split]
        lines.append((f"oxygen documentation split {key}", members))
        # On oxygen with prescribing known = prescribed + not prescribed; with a prescribed target and a
        # saturation = within + above + below.
        for total, parts in (
            ("on_oxygen_prescribed", ("on_oxygen_prescribed", "oxygen_not_prescribed")),
            (
                "within_prescribed_target",
                ("below_prescribed_target", "within_prescribed_target", "above_prescribed_target"),
            ),
        ):
            members = [(count_key("audit_rates", "denominator", measures[total]), "denominator", measures[total])]
            members += [(count_key("audit_rates", "numerator", measures[m]), "numerator", measures[m]) for m in parts]
            lines.append((f"prescribing split {total} {key}", members))
    # Samples = labelled arterial or of unknown type (the FiO2/device documentation denominator) + excluded for
    # their sample type.
    for r in volume:
        documented = by_measure[(r["unit"], r["period"])]["fio2_device_documented"]
        members = [
            (count_key("audit_volume", "samples", r), "samples", r),
            (count_key("audit_rates", "denominator", documented), "denominator", documented),
            (count_key("audit_volume", "excluded_sample_type", r), "excluded_sample_type", r),
        ]
        lines.append((f"sample type split {r['unit']} {r['period']}", members))
    # A rate's numerator (denominator) is the sum of its age bands' numerators (denominators).
    rates_by_key = {(r["measure"], r["unit"], r["period"]): r for r in frame(con, "audit_rates").to_dicts()}
    age_bands: dict[tuple, list] = {}
    for r in frame(con, "audit_age_band_rates").to_dicts():
        age_bands.setdefault((r["measure"], r["unit"], r["period"]), []).append(r)
    for key, members in age_bands.items():
        for column in ("numerator", "denominator"):
            total = rates_by_key[key]
            line = [(count_key("audit_rates", column, total), column, total)]
            line += [(count_key("audit_age_band_rates", column, r), column, r) for r in members]
            lines.append((f"age bands {column} {key}", line))
    bands = frame(con, "audit_pf_bands").to_dicts()
    by_cell: dict[tuple, list] = {}
    for r in bands:
        by_cell.setdefault((r["unit"], r["period"]), []).append(r)
    for key, members in by_cell.items():
        lines.append(
            (
                f"bands {key}",
                [(count_key("audit_pf_bands", "samples_with_pf", members[0]), "samples_with_pf", members[0])]
                + [(count_key("audit_pf_bands", "samples_in_band", r), "samples_in_band", r) for r in members],
            )
        )
    return lines


def check_suppression(con: duckdb.DuckDBPyConnection, k: int) -> int:
    """Assert the published tables show no small count and no line with one hidden cell; return hidden cells."""
    hidden_cells = 0
    for table, columns in COUNT_COLUMNS.items():
        for r in frame(con, table).to_dicts():
            for c in columns:
                if hidden(r, c):
                    hidden_cells += 1
                    assert r[c] is None, (table, c, r)
                else:
                    assert r[c] is None or r[c] == 0 or r[c] >= k, (table, c, r)
            if table in PAIRS:
                x, n = PAIRS[table]
                if r[x] is not None and r[n] is not None:
                    assert not 1 <= r[n] - r[x] < k, ("small remainder shown", table, r)
                if hidden(r, x) or hidden(r, n):
                    assert all(r[d] is None for d in DERIVED[table]), ("derived from a hidden count", table, r)
    for name, members in published_lines(con):
        count = sum(hidden(r, c) for _, c, r in members)
        assert count != 1, f"a hidden count is recoverable from its total: {name}"
    return hidden_cells


def determined_hidden_cells(con: duckdb.DuckDBPyConnection) -> list[str]:
    """Hidden cells whose value follows exactly from the published cells and the sum relations (linear algebra).

    A hidden cell is determined exactly when every solution of the homogeneous system (the relations with the
    published values moved to the right-hand side) leaves it at 0: its coordinate is zero in every null-space
    vector. The system splits into independent blocks (cells linked by shared relations), solved one by one.
    """
    lines = published_lines(con)
    index: dict[tuple[str, str, str], int] = {}
    equations: list[list[tuple[int, float]]] = []
    for _, members in lines:
        terms = []
        for i, (key, c, r) in enumerate(members):
            if hidden(r, c):
                terms.append((index.setdefault(key, len(index)), 1.0 if i == 0 else -1.0))
        if terms:
            equations.append(terms)
    parent = list(range(len(index)))

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for terms in equations:
        for variable, _ in terms[1:]:
            parent[root(variable)] = root(terms[0][0])
    blocks: dict[int, list[list[tuple[int, float]]]] = {}
    for terms in equations:
        blocks.setdefault(root(terms[0][0]), []).append(terms)
    names = {v: " ".join(map(str, key)) for key, v in index.items()}
    determined = []
    for block in blocks.values():
        variables = sorted({v for terms in block for v, _ in terms})
        column = {v: j for j, v in enumerate(variables)}
        a = np.zeros((len(block), len(variables)))
        for row, terms in enumerate(block):
            for v, coefficient in terms:
                a[row, column[v]] += coefficient
        with threadpool_limits(limits=1, user_api="blas"):  # small blocks: one BLAS thread is fastest
            _, singular, vt = np.linalg.svd(a, full_matrices=True)
        rank = int((singular > 1e-9 * max(singular.max(), 1.0)).sum())
        null_space = vt[rank:].T
        for v in variables:
            if null_space.shape[1] == 0 or np.abs(null_space[column[v]]).max() < 1e-9:
                determined.append(names[v])
    return determined


@pytest.fixture(scope="module")
def demo_records() -> pl.DataFrame:
    records, _ = generate(rows=3000, seed=11, days=75)
    return records


@pytest.mark.parametrize(("k", "period"), [(11, "month"), (11, "week"), (5, "week")])
def test_no_small_count_published_and_none_recoverable(tmp_path, demo_records, k, period):
    config = audit_config(tmp_path, k=k, period=period)
    con = build_store(tmp_path, demo_records, config)
    audit(con, config)
    assert check_suppression(con, k) > 0  # the demo data does have small cells to hide
    assert determined_hidden_cells(con) == []
    # the whole-window totals of all units are large and stay visible
    total = frame(con, "audit_volume", "all_units and all_periods").to_dicts()[0]
    assert total["samples"] > 2000 and total["suppressed_columns"] is None
    con.close()


def test_complementary_suppression_hides_a_partner(tmp_path):
    # Ward B February has 5 hypoxaemic samples (small, k 11): its numerator is hidden, and so must be one more
    # numerator in the February column and one in Ward B's row, or the totals would give it away.
    config = audit_config(tmp_path, k=11, complete_periods_only=False)
    rows = hand_rows() + monthly_series("Ward C", [40, 40], [200, 200])
    con = build_store(tmp_path, rows, config)
    audit(con, config)
    check_suppression(con, 11)
    hypo = {(r["unit"], r["period"]): r for r in frame(con, "audit_rates", "measure = 'hypoxaemia'").to_dicts()}
    assert hypo[("Ward B", "2026-02")]["numerator"] is None
    assert hypo[("Ward B", "2026-02")]["denominator"] is None or hypo[("Ward B", "2026-02")]["denominator"] >= 11
    assert hypo[("All units", "all periods")]["numerator"] is not None
    con.close()


def test_no_raw_identifier_in_audit_tables(hand_store):
    ids = [r[0] for r in hand_store.execute("select distinct patient_id from records").fetchall()]
    samples = [r[0] for r in hand_store.execute("select sample_id from records").fetchall()]
    from pipeline.audit import PUBLISHED_TABLES

    for table in PUBLISHED_TABLES:
        text = frame(hand_store, table).write_csv()
        assert not any(i in text for i in ids), table
        assert not any(s in text for s in samples), table
    worklist = frame(hand_store, "review_worklist").write_csv()
    assert not any(i in worklist for i in ids)
    assert RUN_ID in worklist


def test_the_checks_catch_primary_suppression_alone(tmp_path, demo_records, monkeypatch):
    # Without the complementary step, hidden counts are recoverable: both checks must notice.
    monkeypatch.setattr("pipeline.audit.suppress_complementary", lambda con: 0)
    monkeypatch.setattr("pipeline.audit.suppress_determined", lambda con: 0)
    config = audit_config(tmp_path, k=11, period="week")
    con = build_store(tmp_path, demo_records, config)
    audit(con, config)
    assert determined_hidden_cells(con)
    with pytest.raises(AssertionError, match="recoverable"):
        check_suppression(con, 11)
    con.close()


# A unit x period table whose hidden cells leave no line with exactly one hidden cell, yet one hidden cell is
# recoverable: units A and C hide the same two periods (P2, P4), so P2 + P4 of A is known, and with A's total
# so is A's third hidden cell, P3. Units K and S hide P1 and P3.
BRIDGE_HIDDEN = {("A", 2), ("A", 3), ("A", 4), ("C", 2), ("C", 4), ("K", 1), ("K", 3), ("S", 1), ("S", 3)}


def bridge_store() -> duckdb.DuckDBPyConnection:
    """audit_cell and audit_line for BRIDGE_HIDDEN: every inner count 20 (or 3 where hidden), totals shown."""
    con = duckdb.connect()
    install_macros(con)
    con.execute("create temp table audit_partition (partition_id varchar, family varchar, role varchar)")
    units, periods = ["A", "C", "K", "S"], [1, 2, 3, 4, 5]
    inner = {(u, p): 3 if (u, p) in BRIDGE_HIDDEN else 20 for u in units for p in periods}
    cells = [(u, p, v, (u, p) in BRIDGE_HIDDEN) for (u, p), v in inner.items()]
    cells += [(u, None, sum(inner[(u, p)] for p in periods), False) for u in units]
    cells += [(None, p, sum(inner[(u, p)] for u in units), False) for p in periods]
    cells += [(None, None, sum(inner.values()), False)]
    con.execute(
        "create temp table audit_cell (cell_id bigint, family varchar, unit varchar, unit_type varchar, "
        "period_start date, value bigint, additive boolean, hidden boolean, hidden_reason varchar)"
    )
    con.executemany(
        "insert into audit_cell values (?, 'samples', ?, null, ?, ?, true, ?, case when ? then 'small count' end)",
        [
            [i + 1, u, None if p is None else datetime(2026, p, 1).date(), v, h, h]
            for i, (u, p, v, h) in enumerate(cells)
        ],
    )
    run_sql(con, "audit/11_audit_line.sql")
    return con


def bridges(con: duckdb.DuckDBPyConnection) -> list[tuple[str, str]]:
    """Hidden cells that are bridges of the graph whose nodes are the table's rows and columns (the all-units
    row and all-periods column included) and whose edges are the hidden cells. In a two-way table with its
    totals, a hidden cell is exactly determined by the shown ones when, and only when, it lies on no cycle of
    that graph (the constraints are a network's flow conservation; common practice in disclosure control)."""
    hidden_cells = con.execute(
        "select coalesce(unit, 'all'), coalesce(cast(period_start as varchar), 'all') from audit_cell where hidden"
    ).fetchall()
    edges = [(f"unit {u}", f"period {p}") for u, p in hidden_cells]
    found = []
    for i, (a, b) in enumerate(edges):
        rest = edges[:i] + edges[i + 1 :]
        reached, frontier = {a}, [a]
        while frontier:
            node = frontier.pop()
            for x, y in rest:
                for here, there in ((x, y), (y, x)):
                    if here == node and there not in reached:
                        reached.add(there)
                        frontier.append(there)
        if b not in reached:
            found.append((a, b))
    return found


def test_complementary_lines_alone_can_leave_a_count_recoverable_and_the_next_step_closes_it():
    from pipeline.audit import determined_cells, suppress_complementary, suppress_determined

    con = bridge_store()
    assert suppress_complementary(con) == 1  # no line with exactly one hidden cell: nothing to add
    assert bridges(con) == [("unit A", "period 2026-03-01")]  # the graph oracle
    determined = list(determined_cells(con))  # linear algebra agrees
    where = con.execute(
        "select unit, cast(period_start as varchar) from audit_cell where cell_id = ?", [determined[0]]
    ).fetchall()
    assert len(determined) == 1 and where == [("A", "2026-03-01")]
    hidden_before = con.execute("select count(*) from audit_cell where hidden").fetchall()[0][0]
    suppress_determined(con)
    assert bridges(con) == [] and determined_cells(con) == {}
    hidden_after = con.execute("select count(*) from audit_cell where hidden").fetchall()[0][0]
    assert hidden_before < hidden_after <= hidden_before + 3  # a few cells more, not the table
    lines = con.execute(
        "select count(*) from (select l.line_id from audit_line as l join audit_cell as c using (cell_id) "
        "group by l.line_id having sum(case when c.hidden then 1 else 0 end) = 1)"
    ).fetchall()[0][0]
    assert lines == 0
    con.close()

