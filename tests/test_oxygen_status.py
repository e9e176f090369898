"""The derived oxygen status of each patient: target first, then status; age from the birth
date; children and neonates outside the adult targets; unit-type targets from the site.

Limits: BTS 2017 emergency oxygen guideline (O'Driscoll BR et al., Thorax 72 Suppl 1): 94-98 %,
88-92 % at risk of hypercapnic failure; hypoxaemia PaO2 < 60 mmHg (8 kPa) or saturation < 90 %
(common practice). Saturations from the Severinghaus 1979 curve at pH 7.40, 37 C, BE 0
(domain-methods.md section 5 check values: 50 -> 84.99 %, 60 -> 90.58 %, 90 -> 96.95 %; 57 ->
89.22 % and 55 -> 88.18 % by the same formula).
"""

from __future__ import annotations

from datetime import date
from pathlib import Path

import pytest

from pipeline.config import OxygenTarget, load_config
from pipeline.errors import ConfigError
from tests.rule_harness import evaluate, record


def statuses(con) -> dict[str, str | None]:
    return dict(con.execute("select sample_id, oxygen_status from derived").fetchall())


def test_target_is_chosen_before_the_status(tmp_path):
    rows = [
        # at risk of hypercapnic failure, saturation 89.2 % inside 88-92 %: in target, not hypoxaemic
        record("RISK_IN_TARGET", hypercapnic_risk=True, pao2_mmhg=57.0, sao2_pct=None),
        # the same patient at 85.0 %: below 88 % and below 90 %: hypoxaemic
        record("RISK_LOW", hypercapnic_risk=True, pao2_mmhg=50.0, sao2_pct=None),
        # a patient with the usual target at 89.2 %: hypoxaemic (PaO2 < 60)
        record("USUAL_LOW", pao2_mmhg=57.0, sao2_pct=None),
        # PaO2 60.5 -> 90.8 %: below 94 % but not hypoxaemic
        record("USUAL_BELOW", pao2_mmhg=60.5, sao2_pct=None),
    ]
    con = evaluate(tmp_path, rows)
    assert statuses(con) == {
        "RISK_IN_TARGET": "in_target",
        "RISK_LOW": "hypoxaemic",
        "USUAL_LOW": "hypoxaemic",
        "USUAL_BELOW": "below_target",
    }
    sources = dict(con.execute("select sample_id, target_source from derived").fetchall())
    assert sources["RISK_IN_TARGET"] == "hypercapnic_risk" and sources["USUAL_LOW"] == "standard"


def test_no_oxygen_documented_is_never_in_target(tmp_path):
    # Room air at 760 mmHg allows at most 0.21 x (760 - 47.1) - 40 = 109.7 mmHg (+ 5 %, 115.2; alveolar gas
    # equation with R = 1, domain notes section 3).
    nothing = {"fio2": None, "o2_device": None, "sao2_pct": None}
    rows = [
        record("UNKNOWN", pao2_mmhg=90.0, **nothing),
        record("UNKNOWN_DEVICE", pao2_mmhg=90.0, fio2=None, o2_device="unknown", sao2_pct=None),
        record("GIVEN_NOT_CHARTED", pao2_mmhg=444.0, **nothing),
        record("ROOM_AIR_CHARTED", pao2_mmhg=200.0, sao2_pct=None),
        record("ROOM_AIR_FINE", pao2_mmhg=90.0, sao2_pct=None),
        record("HYPOXAEMIC_ANYWAY", pao2_mmhg=50.0, **nothing),
    ]
    con = evaluate(tmp_path, rows)
    assert statuses(con) == {
        "UNKNOWN": "oxygen_unknown",
        "UNKNOWN_DEVICE": "oxygen_unknown",
        "GIVEN_NOT_CHARTED": "undocumented_oxygen",
        "ROOM_AIR_CHARTED": "undocumented_oxygen",
        "ROOM_AIR_FINE": "in_target",
        "HYPOXAEMIC_ANYWAY": "hypoxaemic",
    }
    documented = dict(con.execute("select sample_id, oxygen_documented from derived").fetchall())
    assert documented["UNKNOWN"] is False and documented["ROOM_AIR_FINE"] is True


def test_age_from_birth_date_when_age_is_not_exported(tmp_path):
    # Collected 2026-01-05; born 1986-01-05: 14610 days / 365.25 = 40.0 years; A-a limit 40/4 + 4 = 14 mmHg
    # (common practice).
    rows = [record("BORN", age_years=None, birth_date=date(1986, 1, 5)), record("NO_AGE", age_years=None)]
    con = evaluate(tmp_path, rows)
    got = {r[0]: r[1:] for r in con.execute(
        "select sample_id, age_years_used, age_source, age_group, aa_gradient_expected_mmhg from derived").fetchall()}
    assert got["BORN"][0] == pytest.approx(40.0, abs=1e-9)
    assert got["BORN"][1:] == ("birth_date", "adult", pytest.approx(14.0))
    assert got["NO_AGE"] == (None, None, "unknown", None)


def test_neonates_and_children_are_outside_the_adult_targets(tmp_path):
    # Neonatal period 28 days (WHO, from memory); adult from 16 years by default (a site setting).
    rows = [
        record("NEONATE", age_years=None, birth_date=date(2025, 12, 29), pao2_mmhg=50.0, sao2_pct=None),
        record("CHILD", age_years=9.0, pao2_mmhg=50.0, sao2_pct=None),
        record("SIXTEEN", age_years=16.0, pao2_mmhg=50.0, sao2_pct=None),
    ]
    con = evaluate(tmp_path, rows)
    got = {r[0]: r[1:] for r in con.execute(
        "select sample_id, age_group, oxygen_status, target_low_pct, aa_gradient_expected_mmhg, "
        "arterial_saturation_pct from derived").fetchall()}
    assert got["NEONATE"][:4] == ("neonate", "not_assessed", None, None)
    assert got["NEONATE"][4] is None  # no adult curve reading for fetal haemoglobin
    assert got["CHILD"][:4] == ("child", "not_assessed", None, None)
    assert got["SIXTEEN"][:2] == ("adult", "hypoxaemic")
    assert con.execute("select count(*) from flags where rule_id in ('hypoxaemia', 'aa_gradient_above_age_limit') "
                       "and sample_id in ('NEONATE', 'CHILD')").fetchall() == [(0,)]
    # a site whose adult services start at 18 makes a 16-year-old a child
    con.close()
    again = evaluate(tmp_path / "eighteen", [record("SIXTEEN", age_years=16.0)],
                     overrides={"derive": {"adult_age_years": 18.0}})
    assert again.execute("select age_group from derived").fetchall() == [("child",)]


def test_unit_type_targets_from_the_site(tmp_path):
    # A site may set a target per unit type (here 92-96 % in critical care, invented for the test) and none for
    # paediatrics; documented hypercapnic risk still comes first.
    settings = {
        "unit_types": {"Heron ICU": "critical_care", "Wren Ward": "paediatric"},
        "oxygen_targets": {"critical_care": OxygenTarget(92.0, 96.0)},
    }
    rows = [
        # PaO2 90 -> 96.95 % (Severinghaus): above 92-96 % on oxygen in critical care
        record("ICU", unit="Heron ICU", pao2_mmhg=90.0, sao2_pct=None, o2_device="venturi_mask", fio2=0.28),
        record("ICU_RISK", unit="Heron ICU", hypercapnic_risk=True, pao2_mmhg=57.0, sao2_pct=None),
        record("PAEDIATRIC_UNIT", unit="Wren Ward", pao2_mmhg=90.0, sao2_pct=None),
        record("WARD", unit="Ward A", pao2_mmhg=90.0, sao2_pct=None, o2_device="venturi_mask", fio2=0.28),
    ]
    con = evaluate(tmp_path, rows, **settings)
    got = {r[0]: r[1:] for r in con.execute(
        "select sample_id, target_source, target_low_pct, target_high_pct, oxygen_status, unit_type "
        "from derived").fetchall()}
    assert got["ICU"] == ("unit_type", 92.0, 96.0, "above_target_on_oxygen", "critical_care")
    assert got["ICU_RISK"][:4] == ("hypercapnic_risk", 88.0, 92.0, "in_target")
    assert got["PAEDIATRIC_UNIT"][:4] == (None, None, None, "not_assessed")
    assert got["WARD"][:4] == ("standard", 94.0, 98.0, "in_target")


def write_site(tmp_path: Path, extra: str) -> Path:
    (tmp_path / "profile.toml").write_text(
        (Path(__file__).parent / "fixtures" / "profiles" / "minimal.toml").read_text(encoding="utf-8"),
        encoding="utf-8",
    )
    config = tmp_path / "site.toml"
    config.write_text(
        '[site]\nname = "x"\naltitude_m = 0\n[[inputs]]\npath = "in"\nprofile = "profile.toml"\n' + extra,
        encoding="utf-8",
    )
    return config


def test_site_configuration_of_unit_types_and_targets(tmp_path):
    config = load_config(write_site(tmp_path, '[unit_types]\n"Heron ICU" = "critical_care"\n"Wren Ward" = '
                                              '"paediatric"\n[oxygen_targets.critical_care]\nlow_pct = 92\n'
                                              'high_pct = 96\n'))
    assert config.unit_target_rows() == [
        ("Heron ICU", "critical_care", 92.0, 96.0, True),
        ("Wren Ward", "paediatric", None, None, False),
    ]
    with pytest.raises(ConfigError, match="no unit has this type"):
        load_config(write_site(tmp_path, "[oxygen_targets.neonatal]\nassess = false\n"))
    with pytest.raises(ConfigError, match="low_pct < high_pct"):
        load_config(write_site(tmp_path, '[unit_types]\nA = "critical_care"\n'
                                         "[oxygen_targets.critical_care]\nlow_pct = 96\nhigh_pct = 92\n"))
