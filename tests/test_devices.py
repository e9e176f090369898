"""Oxygen-device macros (sql/macros/30_devices.sql): which FiO2 a documented device and flow can deliver.

Ranges are the plausibility table of domain-methods.md section 9, itself common practice built on
the BTS 2017 guideline and Wettstein, Shelledy & Peters 2005 (Respir Care). Each check says so.
"""

from __future__ import annotations

import duckdb
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.physiology import connect, evaluate
from pipeline.schema import OXYGEN_DEVICES

SET_FIO2_DEVICES = ["high_flow_nasal", "cpap", "niv", "invasive_ventilation", "tracheostomy_mask"]


@pytest.fixture(scope="module")
def con() -> duckdb.DuckDBPyConnection:
    return connect()


def bounds(con: duckdb.DuckDBPyConnection, device: str | None, flow: float | None) -> list[object]:
    (row,) = evaluate(
        "[device_fio2_min(d, q), device_fio2_expected(d, q), device_fio2_max(d, q)]",
        connection=con,
        d=[device],
        q=[flow],
    )
    return row


@pytest.mark.parametrize(
    ("device", "flow", "low", "high"),
    # domain-methods.md section 9, "plausible range for audit" column (common practice)
    [
        ("room_air", None, 0.20, 0.22),
        ("simple_mask", 6.0, 0.30, 0.65),
        ("venturi_mask", 4.0, 0.23, 0.61),  # labelled settings 0.24 ... 0.60, each +/- 0.01
        ("reservoir_mask", 15.0, 0.50, 1.00),
        *[(device, 40.0, 0.21, 1.00) for device in SET_FIO2_DEVICES],
    ],
)
def test_plausible_ranges_by_device(
    con: duckdb.DuckDBPyConnection, device: str, flow: float | None, low: float, high: float
) -> None:
    got = bounds(con, device, flow)
    assert got[0] == pytest.approx(low)
    assert got[2] == pytest.approx(high)


@pytest.mark.parametrize(
    ("flow", "high"),
    # nasal cannula 0.22 <= FiO2 <= min(0.25 + 0.05 Q, 0.55): domain-methods.md section 9 (common practice);
    # 2 L/min -> 0.35 as in the section 3 example
    [(0.0, 0.25), (1.0, 0.30), (2.0, 0.35), (4.0, 0.45), (6.0, 0.55), (10.0, 0.55), (None, 0.55)],
)
def test_nasal_cannula_range_depends_on_flow(con: duckdb.DuckDBPyConnection, flow: float | None, high: float) -> None:
    low, _, got_high = bounds(con, "nasal_cannula", flow)
    assert low == pytest.approx(0.22)
    assert got_high == pytest.approx(high)


@pytest.mark.parametrize(
    ("flow", "expected"),
    # bedside rule, about 4 % per L/min: 1 L/min 0.24 ... 6 L/min 0.44, domain-methods.md section 9
    # (common practice)
    [(1.0, 0.24), (2.0, 0.28), (3.0, 0.32), (4.0, 0.36), (5.0, 0.40), (6.0, 0.44)],
)
def test_nasal_cannula_expected_fio2(con: duckdb.DuckDBPyConnection, flow: float, expected: float) -> None:
    assert bounds(con, "nasal_cannula", flow)[1] == pytest.approx(expected)


def test_nasal_cannula_without_flow_has_no_expected_fio2(con: duckdb.DuckDBPyConnection) -> None:
    # the bedside rule needs the flow; without it only the flow-independent range is known
    assert bounds(con, "nasal_cannula", None)[1] is None


def test_expected_fio2_for_fixed_devices(con: duckdb.DuckDBPyConnection) -> None:
    # room air 0.21 (common practice); simple mask ~0.35-0.55 and reservoir ~0.60-0.90 (midpoints),
    # domain-methods.md section 9 (common practice)
    assert bounds(con, "room_air", None)[1] == pytest.approx(0.21)
    assert bounds(con, "simple_mask", 8.0)[1] == pytest.approx((0.35 + 0.55) / 2)
    assert bounds(con, "reservoir_mask", 15.0)[1] == pytest.approx((0.60 + 0.90) / 2)
    # Venturi and set-FiO2 devices: the labelled or set value is the expectation, nothing to add
    for device in ["venturi_mask", *SET_FIO2_DEVICES]:
        assert bounds(con, device, 10.0)[1] is None


@pytest.mark.parametrize("device", ["other", "unknown", None, "Nasal_Cannula", "face tent"])
def test_unknown_devices_give_null(con: duckdb.DuckDBPyConnection, device: str | None) -> None:
    assert bounds(con, device, 2.0) == [None, None, None]


def test_negative_flow_gives_null(con: duckdb.DuckDBPyConnection) -> None:
    assert bounds(con, "nasal_cannula", -1.0) == [None, None, None]
    assert bounds(con, "room_air", -1.0) == [None, None, None]


def test_every_canonical_device_is_covered(con: duckdb.DuckDBPyConnection) -> None:
    # every code of pipeline/schema.py except other/unknown has a range, so a new code cannot slip past
    known = [d for d in OXYGEN_DEVICES if d not in ("other", "unknown")]
    lows = evaluate("device_fio2_min(d, 2)", connection=con, d=known)
    assert None not in lows


@settings(max_examples=40, deadline=None)
@given(
    st.lists(
        st.tuples(st.sampled_from(OXYGEN_DEVICES), st.one_of(st.none(), st.floats(0.0, 70.0))),
        min_size=1,
        max_size=40,
    )
)
def test_expected_lies_within_the_plausible_range(rows: list[tuple[str, float | None]]) -> None:
    devices, flows = (list(column) for column in zip(*rows, strict=True))
    for low, expected, high in evaluate(
        "[device_fio2_min(d, q), device_fio2_expected(d, q), device_fio2_max(d, q)]", d=devices, q=flows
    ):
        if low is None:
            assert expected is None and high is None
            continue
        assert 0.20 <= low <= high <= 1.0
        if expected is not None:
            assert low <= expected <= high


@pytest.mark.parametrize(
    ("fio2", "setting", "min_flow"),
    # Venturi minimum flows 24 % 2, 28 % 4, 31 % 6, 35 % 8, 40 % 10, 50 % 12, 60 % 15 L/min:
    # domain-methods.md section 9 (from memory); 28 % at 4 L/min as in the BTS 2017 guideline (verified)
    [
        (0.24, 0.24, 2.0),
        (0.28, 0.28, 4.0),
        (0.29, 0.28, 4.0),
        (0.30, 0.31, 6.0),
        (0.35, 0.35, 8.0),
        (0.40, 0.40, 10.0),
        (0.50, 0.50, 12.0),
        (0.60, 0.60, 15.0),
        (0.26, None, None),
        (0.45, None, None),
        (None, None, None),
    ],
)
def test_venturi_settings_and_minimum_flows(
    con: duckdb.DuckDBPyConnection, fio2: float | None, setting: float | None, min_flow: float | None
) -> None:
    (row,) = evaluate("[venturi_labelled_fio2(f), venturi_min_flow_l_min(f)]", connection=con, f=[fio2])
    assert row == [setting, min_flow]
