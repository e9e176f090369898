"""The prescribing audit: each sample linked to the prescription active when it was taken, the
prescribing measures, and episode-level rates beside sample-level ones.

Every expected value below is hand-counted from the fixture (no pipeline code computes it).
Saturations follow the Severinghaus 1979 curve at pH 7.40, 37 C, BE 0 (domain-methods.md
section 5 check values: PaO2 50 -> 84.99 %, 90 -> 96.95 %; 150 -> 99.32 % by the same formula).
Targets: BTS 2017 emergency oxygen guideline, 94-98 %, 88-92 % at risk of hypercapnic failure.
"""

from __future__ import annotations

import dataclasses
from datetime import datetime, timedelta
from typing import Any

import duckdb
import pytest

from tests.audit_store import RUN_ID, audit, audit_config, build_store, frame
from tests.rule_harness import record as clean_record

DAY = datetime(2026, 1, 12)


def at(hour: float, day: int = 0) -> datetime:
    return DAY + timedelta(days=day, hours=hour)


def record(sample_id: str, **changes: Any) -> dict[str, Any]:
    """A clean sample (tests/rule_harness.py) resulted ten minutes after its collection."""
    row = clean_record(sample_id, **changes)
    return {**row, "resulted_at": row["collected_at"] + timedelta(minutes=10)}


def add_prescription(
    con: duckdb.DuckDBPyConnection, prescription_id: str, patient: str, start: datetime, **fields: Any
) -> None:
    values = {
        "prescription_id": prescription_id,
        "patient_id": patient,
        "patient_key": patient,  # the hand-written samples carry patient_key = patient_id too
        "start_at": start,
        "version": 1,
        "run_id": RUN_ID,
        "source_file": "prescriptions.csv",
        "source_row": 1,
        **fields,
    }
    names = ", ".join(values)
    marks = ", ".join("?" for _ in values)
    con.execute(f"insert into prescriptions ({names}) values ({marks})", list(values.values()))


def link_store(tmp_path, rows: list[dict[str, Any]], prescriptions: list[tuple], **config: Any):
    """Records and prescriptions in a store, then derive (and rules) over every sample."""
    from pipeline.derive import derive
    from pipeline.rules import load_catalogue
    from pipeline.sql_files import run_sql
    from pipeline.store import open_store
    from tests.rule_harness import insert_records, site_config

    con = open_store(tmp_path / "store.duckdb")
    insert_records(con, rows)
    for rx_id, patient, start, fields in prescriptions:
        add_prescription(con, rx_id, patient, start, **fields)
    for row in rows:
        if row.get("encounter_key"):
            con.execute(
                "update records set encounter_key = ? where sample_id = ?", [row["encounter_key"], row["sample_id"]]
            )
    run_sql(con, "derive/00_scope.sql", run_id="t1", rebuild=True)
    derive(con, load_catalogue(None), site_config(tmp_path, **config))
    return con


def links(con) -> dict[str, tuple]:
    rows = con.execute(
        "select sample_id, prescription_id, prescription_source, prescription_status, prescribed_target_low_pct, "
        "prescribed_target_high_pct from derived"
    ).fetchall()
    return {r[0]: r[1:] for r in rows}


ON_OXYGEN = {"o2_device": "venturi_mask", "fio2": 0.28, "spo2_pct": None}


def test_each_sample_links_to_the_prescription_active_at_collection(tmp_path):
    prescriptions = [
        # P1: 94-98 % from 08:00 to 12:00, replaced at 11:00 by an open-ended 88-92 % (overlap 11-12)
        (
            "RX1",
            "P1",
            at(8),
            {"end_at": at(12), "target_spo2_low_pct": 94.0, "target_spo2_high_pct": 98.0, "encounter_key": "E1"},
        ),
        ("RX2", "P1", at(11), {"target_spo2_low_pct": 88.0, "target_spo2_high_pct": 92.0, "encounter_key": "E1"}),
        # P2: oxygen prescribed 06:00-10:00 without a target range; the feed covers from 06:00
        ("RX3", "P2", at(6), {"end_at": at(10)}),
    ]
    rows = [
        record("BEFORE_START", patient_id="P1", collected_at=at(7), **ON_OXYGEN),
        record("INSIDE", patient_id="P1", collected_at=at(9), encounter_key="E1", **ON_OXYGEN),
        record("OVERLAP", patient_id="P1", collected_at=at(11.5), **ON_OXYGEN),
        record("AT_END", patient_id="P1", collected_at=at(12), **ON_OXYGEN),
        record("OPEN_ENDED", patient_id="P1", collected_at=at(10, day=1), **ON_OXYGEN),
        record("OTHER_ENCOUNTER", patient_id="P1", collected_at=at(9.5), encounter_key="E2", **ON_OXYGEN),
        record("NO_TARGET", patient_id="P2", collected_at=at(7), **ON_OXYGEN),
        record("AFTER_END", patient_id="P2", collected_at=at(10), **ON_OXYGEN),
        record("NONE_HELD", patient_id="P3", collected_at=at(9), **ON_OXYGEN),
        record("BEFORE_FEED", patient_id="P3", collected_at=at(5), **ON_OXYGEN),
        record(
            "CHARTED_ON_SAMPLE",
            patient_id="P4",
            collected_at=at(4),
            target_spo2_low_pct=92.0,
            target_spo2_high_pct=96.0,
            **ON_OXYGEN,
        ),
        record("CHARTED_NOT_PRESCRIBED", patient_id="P5", collected_at=at(4), o2_prescribed=False, **ON_OXYGEN),
    ]
    con = link_store(tmp_path, rows, prescriptions)
    assert links(con) == {
        # hand-counted from the linking rule (sql/derive/05_prescription_link.sql)
        "BEFORE_START": (None, None, "not_prescribed", None, None),
        "INSIDE": ("RX1", "feed", "prescribed", 94.0, 98.0),
        "OVERLAP": ("RX2", "feed", "prescribed", 88.0, 92.0),  # the later start wins
        "AT_END": ("RX2", "feed", "prescribed", 88.0, 92.0),  # RX1 is over at its end time
        "OPEN_ENDED": ("RX2", "feed", "prescribed", 88.0, 92.0),
        "OTHER_ENCOUNTER": (None, None, "not_prescribed", None, None),  # RX1 belongs to encounter E1
        "NO_TARGET": ("RX3", "feed", "prescribed_without_target", None, None),
        "AFTER_END": (None, None, "not_prescribed", None, None),
        "NONE_HELD": (None, None, "not_prescribed", None, None),
        "BEFORE_FEED": (None, None, "prescription_unknown", None, None),  # before the feed's first start
        "CHARTED_ON_SAMPLE": (None, "sample", "prescribed", 92.0, 96.0),
        "CHARTED_NOT_PRESCRIBED": (None, "sample", "not_prescribed", None, None),
    }
    targets = dict(con.execute("select sample_id, target_source from derived").fetchall())
    assert targets["OVERLAP"] == "prescription" and targets["NONE_HELD"] == "standard"


def test_without_a_feed_prescribing_is_unknown(tmp_path):
    con = link_store(tmp_path, [record("S1", **ON_OXYGEN)], [])
    assert links(con)["S1"] == (None, None, "prescription_unknown", None, None)


@pytest.mark.parametrize(
    ("pao2", "risk", "low", "high", "position", "conflict"),
    [
        # Severinghaus: 150 -> 99.3 %, above 94-98; documented at risk yet prescribed 94-98: disagrees
        (150.0, True, 94.0, 98.0, "above", True),
        # 60 -> 90.6 %, inside 88-92; not at risk yet prescribed 88-92: disagrees
        (60.0, False, 88.0, 92.0, "within", True),
        # 50 -> 85.0 %, below 88-92; at risk and prescribed 88-92: agrees
        (50.0, True, 88.0, 92.0, "below", False),
        # risk not documented: no judgement
        (90.0, None, 94.0, 98.0, "within", None),
    ],
)
def test_position_against_the_prescribed_range_and_agreement_with_risk(
    tmp_path, pao2, risk, low, high, position, conflict
):
    rows = [record("S1", collected_at=at(9), pao2_mmhg=pao2, sao2_pct=None, hypercapnic_risk=risk, **ON_OXYGEN)]
    prescriptions = [("RX", "P1", at(0), {"target_spo2_low_pct": low, "target_spo2_high_pct": high})]
    con = link_store(tmp_path, rows, prescriptions)
    got = con.execute("select prescribed_target_position, prescribed_target_conflicts_risk from derived").fetchall()
    assert got == [(position, conflict)]


# --- audit: episode-level rates beside sample-level ones -----------------------------------------------------

HYPOXAEMIC = {"pao2_mmhg": 50.0, "sao2_pct": 85.0}  # Severinghaus 84.99 %: below 94 and below 90
WITHIN = {"pao2_mmhg": 90.0, "sao2_pct": 96.9}  # 96.95 %
ABOVE = {"pao2_mmhg": 150.0, "sao2_pct": 99.3}  # 99.32 %
ROOM_AIR = {"o2_device": "room_air", "fio2": 0.21, "spo2_pct": None}


def episode_rows() -> list[dict[str, Any]]:
    return [
        # E1, encounter X1: hypoxaemic first, then in target
        record("E1a", patient_id="P1", encounter_id="X1", collected_at=at(8), **HYPOXAEMIC, **ON_OXYGEN),
        record("E1b", patient_id="P1", encounter_id="X1", collected_at=at(14), **WITHIN, **ON_OXYGEN),
        # E2, encounter X2: in target, then above it
        record("E2a", patient_id="P2", encounter_id="X2", collected_at=at(8), **WITHIN, **ON_OXYGEN),
        record("E2b", patient_id="P2", encounter_id="X2", collected_at=at(9), **ABOVE, **ON_OXYGEN),
        # P3 has no encounter: two patient-days, in target on oxygen, then hypoxaemic on room air
        record("E3", patient_id="P3", collected_at=at(8), **WITHIN, **ON_OXYGEN),
        record("E4", patient_id="P3", collected_at=at(8, day=1), **HYPOXAEMIC, **ROOM_AIR),
    ]


def rates(con, level: str) -> dict[str, tuple[int, int]]:
    got = frame(con, "audit_rates", f"level = '{level}' and all_units and all_periods and unit_type is null")
    return {r["measure"]: (r["numerator"], r["denominator"]) for r in got.to_dicts()}


def test_episode_rates_count_each_episode_once(tmp_path):
    config = audit_config(tmp_path, k=1)
    rows = episode_rows()
    con = build_store(tmp_path, rows, config)
    con.execute("update records set encounter_key = 'enc-' || encounter_id where encounter_id is not null")
    # derive again so that the episode keys follow the encounters
    from pipeline.derive import derive
    from pipeline.rules import load_catalogue
    from pipeline.sql_files import run_sql

    run_sql(con, "derive/00_scope.sql", run_id=RUN_ID, rebuild=True)
    derive(con, load_catalogue(config.thresholds), config)
    assert dict(con.execute("select sample_id, audit_status from audit_status").fetchall()) == dict.fromkeys(
        [r["sample_id"] for r in rows], "usable"
    )
    audit(con, config)
    episodes = rates(con, "episode")
    # hand-counted: four episodes (X1, X2, P3 day 1, P3 day 2); first sample hypoxaemic in X1 and P3 day 2;
    # three episodes on oxygen (X1, X2, P3 day 1); above target in X2; outside target in X1 (below) and X2
    assert episodes == {
        "episode_first_sample_hypoxaemic": (2, 4),
        "episode_any_hypoxaemia": (2, 4),
        "episode_any_above_target_on_oxygen": (1, 3),
        "episode_any_out_of_target_on_oxygen": (2, 3),
    }
    samples = rates(con, "sample")
    assert samples["hypoxaemia"] == (2, 6)  # per sample: 2 of 6
    assert samples["above_target_on_oxygen"] == (1, 5)


def test_prescribing_measures_per_sample(tmp_path):
    config = audit_config(tmp_path, k=1)
    rows = [
        record("A", patient_id="P1", collected_at=at(9), hypercapnic_risk=False, **WITHIN, **ON_OXYGEN),
        record("B", patient_id="P1", collected_at=at(10), hypercapnic_risk=True, **ABOVE, **ON_OXYGEN),
        record("C", patient_id="P2", collected_at=at(9), **HYPOXAEMIC, **ON_OXYGEN),
        record("D", patient_id="P3", collected_at=at(9), **WITHIN, **ON_OXYGEN),
        record("E", patient_id="P4", collected_at=at(9), **WITHIN, **ROOM_AIR),
    ]
    con = build_store(tmp_path, rows, config)
    con.execute("delete from prescriptions")
    add_prescription(
        con,
        "RX1",
        con.execute("select patient_key from records where sample_id = 'A'").fetchone()[0],
        at(8),
        target_spo2_low_pct=94.0,
        target_spo2_high_pct=98.0,
    )
    add_prescription(
        con, "RX2", con.execute("select patient_key from records where sample_id = 'C'").fetchone()[0], at(8)
    )
    from pipeline.derive import derive
    from pipeline.rules import load_catalogue
    from pipeline.sql_files import run_sql

    run_sql(con, "derive/00_scope.sql", run_id=RUN_ID, rebuild=True)
    derive(con, load_catalogue(config.thresholds), config)
    audit(con, config)
    got = rates(con, "sample")
    # hand-counted: on oxygen A, B, C, D (E is on room air); prescribed A, B (RX1, target) and C (RX2, no
    # target); D not prescribed. A within 94-98, B above. B at risk with 94-98 disagrees; A not at risk agrees.
    assert got["on_oxygen_prescribed"] == (3, 4)
    assert got["prescribed_target_documented"] == (2, 4)
    assert got["within_prescribed_target"] == (1, 2)
    assert got["above_prescribed_target"] == (1, 2)
    assert got["below_prescribed_target"] == (0, 2)
    assert got["oxygen_not_prescribed"] == (1, 4)
    assert got["prescribed_target_disagrees_with_risk"] == (1, 2)


def test_unit_types_get_their_own_rows(tmp_path):
    config = audit_config(tmp_path, k=1)
    config = dataclasses.replace(config, unit_types={"Heron ICU": "critical_care", "Ward A": "ward"})
    rows = [
        record("I1", unit="Heron ICU", patient_id="P1", **WITHIN, **ON_OXYGEN),
        record("I2", unit="Heron ICU", patient_id="P2", **ABOVE, **ON_OXYGEN),
        record("W1", unit="Ward A", patient_id="P3", **WITHIN, **ON_OXYGEN),
    ]
    con = build_store(tmp_path, rows, config)
    audit(con, config)
    got = frame(con, "audit_rates", "measure = 'above_target_on_oxygen' and all_periods")
    places = {(r["unit"], r["unit_type"]): (r["numerator"], r["denominator"]) for r in got.to_dicts()}
    assert places == {
        ("Heron ICU", "critical_care"): (1, 2),
        ("Ward A", "ward"): (0, 1),
        ("All critical care units", "critical_care"): (1, 2),
        ("All ward units", "ward"): (0, 1),
        ("All units", None): (1, 3),
    }


def test_rates_by_adult_age_band(tmp_path):
    config = audit_config(tmp_path, k=1)
    rows = [
        record("Y1", patient_id="P1", age_years=30.0, **HYPOXAEMIC, **ON_OXYGEN),
        record("Y2", patient_id="P2", age_years=44.9, **WITHIN, **ON_OXYGEN),
        record("M1", patient_id="P3", age_years=45.0, **ABOVE, **ON_OXYGEN),
        record("O1", patient_id="P4", age_years=85.0, **HYPOXAEMIC, **ROOM_AIR),
        record("U1", patient_id="P5", age_years=None, **WITHIN, **ON_OXYGEN),
        record("C1", patient_id="P6", age_years=10.0, **HYPOXAEMIC, **ON_OXYGEN),  # a child: in no adult band
    ]
    con = build_store(tmp_path, rows, config)
    audit(con, config)
    got = frame(con, "audit_age_band_rates", "unit = 'All units' and all_periods")
    table = {(r["measure"], r["age_band"]): (r["numerator"], r["denominator"]) for r in got.to_dicts()}
    # hand-counted: under 45 = Y1 (hypoxaemic) + Y2; 45-64 = M1 (above target on oxygen); 80 and over = O1 on air
    assert table[("hypoxaemia", "under 45")] == (1, 2)
    assert table[("hypoxaemia", "45-64")] == (0, 1)
    assert table[("hypoxaemia", "65-79")] == (0, 0)
    assert table[("hypoxaemia", "80 and over")] == (1, 1)
    assert table[("hypoxaemia", "age unknown")] == (0, 1)
    assert table[("above_target_on_oxygen", "45-64")] == (1, 1)
    assert table[("above_target_on_oxygen", "80 and over")] == (0, 0)
    overall = rates(con, "sample")["hypoxaemia"]
    assert overall == (2, 5)  # the bands add up to the adult rate; the child is outside it


def test_internal_outputs_use_their_own_threshold_and_the_store_keeps_publication(tmp_path):
    from pipeline.log import Log
    from pipeline.publish import build_and_write
    from pipeline.rules import load_catalogue

    config = dataclasses.replace(audit_config(tmp_path, k=11), internal_small_cell_threshold=3)
    # 30 samples of Ward A, 5 hypoxaemic: the 5 is a small count for publication (k 11), not internally (k 3)
    rows = [
        record(f"S{i}", patient_id=f"P{i}", collected_at=at(i), **(HYPOXAEMIC if i < 5 else WITHIN), **ON_OXYGEN)
        for i in range(30)
    ]
    con = build_store(tmp_path, rows, config)
    written = build_and_write(con, config, load_catalogue(config.thresholds), RUN_ID, Log(quiet=True))
    internal = config.output_folder / "internal"
    assert any(internal in p.parents for p in written) and any(p.parent == config.output_folder for p in written)

    def hypoxaemia(folder) -> tuple[int | None, int | None]:
        import polars as pl

        got = pl.read_parquet(folder / "tables" / "audit_rates.parquet").filter(
            (pl.col("measure") == "hypoxaemia") & pl.col("all_periods") & (pl.col("unit") == "Ward A")
        )
        return got.select("numerator", "denominator").row(0)

    assert hypoxaemia(internal) == (5, 30)  # hand-counted
    assert hypoxaemia(config.output_folder) == (None, 30)
    # the store holds the publication tables (built last)
    stored = con.execute(
        "select numerator from audit_rates where measure = 'hypoxaemia' and unit = 'Ward A' and all_periods"
    ).fetchall()
    assert stored == [(None,)]
    html = (internal / "audit_report.html").read_text(encoding="utf-8")
    assert "INTERNAL" in html and "not for release" in html
