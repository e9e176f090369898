"""Unit-conversion macros (sql/macros/10_units.sql) against the pint unit registry and published checks."""

from __future__ import annotations

import math

import duckdb
import pint
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.physiology import connect, evaluate

UREG = pint.UnitRegistry()


@pytest.fixture(scope="module")
def con() -> duckdb.DuckDBPyConnection:
    return connect()


def one(con: duckdb.DuckDBPyConnection, sql_expression: str, **columns: object) -> object:
    (value,) = evaluate(sql_expression, connection=con, **columns)
    return value


PRESSURES = [0.0, 1.3, 5.3, 12.0, 47.0, 101.325, 760.0]


# ---- pressure ---------------------------------------------------------------------------------


@pytest.mark.parametrize("kpa", PRESSURES)
def test_kpa_to_mmhg_matches_pint(con: duckdb.DuckDBPyConnection, kpa: float) -> None:
    expected = UREG.Quantity(kpa, "kPa").to("mmHg").magnitude  # oracle: pint
    assert one(con, "kpa_to_mmhg(x)", x=[kpa]) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("mmhg", PRESSURES)
def test_mmhg_to_kpa_matches_pint(con: duckdb.DuckDBPyConnection, mmhg: float) -> None:
    expected = UREG.Quantity(mmhg, "mmHg").to("kPa").magnitude  # oracle: pint
    assert one(con, "mmhg_to_kpa(x)", x=[mmhg]) == pytest.approx(expected, rel=1e-12)


def test_kpa_factor_is_7_50062(con: duckdb.DuckDBPyConnection) -> None:
    # 1 kPa = 7.50062 mmHg: domain-methods.md section 11 [V] (conventional mmHg, NIST SP 811)
    assert one(con, "kpa_to_mmhg(1)") == pytest.approx(7.50062, abs=5e-6)


@pytest.mark.parametrize(
    ("sql", "expected", "tol"),
    [
        # domain-methods.md section 11 checks [V]
        ("mmhg_to_kpa(47)", 6.266, 5e-4),
        ("mmhg_to_kpa(760)", 101.325, 5e-4),
        ("kpa_to_mmhg(12)", 90.01, 5e-3),
        ("kpa_to_mmhg(5.3)", 39.75, 5e-3),
    ],
)
def test_pressure_checks_from_reference_sheet(
    con: duckdb.DuckDBPyConnection, sql: str, expected: float, tol: float
) -> None:
    assert one(con, sql) == pytest.approx(expected, abs=tol)


def test_pressure_to_mmhg_by_unit(con: duckdb.DuckDBPyConnection) -> None:
    got = evaluate(
        "pressure_to_mmhg(x, u)",
        connection=con,
        x=[40.0, 5.3, 5.3, 5.3, None, 40.0],
        u=["mmHg", "kPa", "Pa", "mmhg", "kPa", None],
    )
    expected_kpa = UREG.Quantity(5.3, "kPa").to("mmHg").magnitude  # oracle: pint
    assert got[0] == 40.0
    assert got[1] == pytest.approx(expected_kpa, rel=1e-12)
    assert got[2:] == [None, None, None, None]  # unknown unit, unit spelt differently, NULL value, NULL unit


@settings(max_examples=25, deadline=None)
@given(st.lists(st.floats(min_value=-1e6, max_value=1e6, allow_nan=False), min_size=1, max_size=50))
def test_pressure_round_trip(values: list[float]) -> None:
    back = evaluate("mmhg_to_kpa(kpa_to_mmhg(x))", x=values)
    for value, result in zip(values, back, strict=True):
        assert result == pytest.approx(value, rel=1e-12, abs=1e-9)


# ---- temperature ------------------------------------------------------------------------------


@pytest.mark.parametrize("fahrenheit", [-40.0, 32.0, 86.0, 98.6, 104.0, 113.0])
def test_fahrenheit_to_celsius_matches_pint(con: duckdb.DuckDBPyConnection, fahrenheit: float) -> None:
    expected = UREG.Quantity(fahrenheit, UREG.degF).to(UREG.degC).magnitude  # oracle: pint
    assert one(con, "fahrenheit_to_celsius(x)", x=[fahrenheit]) == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("celsius", [-40.0, 0.0, 30.0, 37.0, 40.0, 45.0])
def test_celsius_to_fahrenheit_matches_pint(con: duckdb.DuckDBPyConnection, celsius: float) -> None:
    expected = UREG.Quantity(celsius, UREG.degC).to(UREG.degF).magnitude  # oracle: pint
    assert one(con, "celsius_to_fahrenheit(x)", x=[celsius]) == pytest.approx(expected, abs=1e-9)


def test_temperature_checks_from_reference_sheet(con: duckdb.DuckDBPyConnection) -> None:
    # 98.6 F -> 37.0 C and 104 F -> 40.0 C: domain-methods.md section 11 (common practice)
    assert one(con, "fahrenheit_to_celsius(98.6)") == pytest.approx(37.0, abs=1e-9)
    assert one(con, "fahrenheit_to_celsius(104)") == pytest.approx(40.0, abs=1e-9)


def test_temperature_to_c_by_unit(con: duckdb.DuckDBPyConnection) -> None:
    got = evaluate("temperature_to_c(x, u)", connection=con, x=[37.0, 98.6, 310.15, None], u=["C", "F", "K", "C"])
    assert got[0] == 37.0
    assert got[1] == pytest.approx(UREG.Quantity(98.6, UREG.degF).to(UREG.degC).magnitude)  # oracle: pint
    assert got[2:] == [None, None]  # kelvin is not a unit a profile may declare


# ---- fractions and percentages ----------------------------------------------------------------


def test_fio2_to_fraction_by_unit(con: duckdb.DuckDBPyConnection) -> None:
    # FiO2 % / 100 = fraction: domain-methods.md section 11 (common practice); pint's percent agrees
    got = evaluate(
        "fio2_to_fraction(x, u)",
        connection=con,
        x=[21.0, 0.21, 100.0, 35.0, None],
        u=["percent", "fraction", "percent", "%", "percent"],
    )
    assert got[0] == pytest.approx(UREG.Quantity(21.0, "percent").to("dimensionless").magnitude)  # oracle: pint
    assert got[1] == 0.21
    assert got[2] == pytest.approx(1.0)
    assert got[3:] == [None, None]


def test_saturation_to_pct_by_unit(con: duckdb.DuckDBPyConnection) -> None:
    # SO2 fraction x 100 = percent: domain-methods.md section 11 (common practice); pint's percent agrees
    got = evaluate(
        "saturation_to_pct(x, u)",
        connection=con,
        x=[97.0, 0.97, 0.97, None],
        u=["percent", "fraction", "pct", "fraction"],
    )
    assert got[0] == 97.0
    assert got[1] == pytest.approx(UREG.Quantity(0.97, "dimensionless").to("percent").magnitude)  # oracle: pint
    assert got[2:] == [None, None]


# ---- haemoglobin and lactate ------------------------------------------------------------------

HB_MONOMER_G_PER_MOL = 16114.5  # haemoglobin per haem monomer (ICSH/IFCC convention), from memory


def test_hb_to_g_dl_by_unit(con: duckdb.DuckDBPyConnection) -> None:
    got = evaluate(
        "hb_to_g_dl(x, u)",
        connection=con,
        x=[14.0, 140.0, 8.7, 8.7, None],
        u=["g/dL", "g/L", "mmol/L", "mg/dL", "g/L"],
    )
    assert got[0] == 14.0
    assert got[1] == pytest.approx(UREG.Quantity(140.0, "g/L").to("g/dL").magnitude)  # oracle: pint
    # oracle: pint, amount concentration x molar mass (from memory, above) -> mass concentration
    via_pint = (UREG.Quantity(8.7, "mmol/L") * UREG.Quantity(HB_MONOMER_G_PER_MOL, "g/mol")).to("g/dL").magnitude
    assert got[2] == pytest.approx(via_pint, rel=1e-9)
    assert got[3:] == [None, None]


def test_hb_factor_matches_common_practice(con: duckdb.DuckDBPyConnection) -> None:
    # Hb g/dL x 0.6206 = mmol/L: domain-methods.md section 11 (common practice)
    assert 1.0 / one(con, "hb_to_g_dl(1, 'mmol/L')") == pytest.approx(0.6206, rel=1e-4)


LACTIC_ACID_G_PER_MOL = 90.08  # C3H6O3, domain-methods.md section 11 (common practice)
GLUCOSE_G_PER_MOL = 180.156  # C6H12O6 (common practice; domain-methods.md section 11 gives mg/dL / 18.016)


@pytest.mark.parametrize(
    ("macro", "molar_mass_g_per_mol"),
    [("lactate_to_mmol_l", LACTIC_ACID_G_PER_MOL), ("glucose_to_mmol_l", GLUCOSE_G_PER_MOL)],
)
def test_mass_concentration_macros_by_unit(
    con: duckdb.DuckDBPyConnection, macro: str, molar_mass_g_per_mol: float
) -> None:
    got = evaluate(
        f"{macro}(x, u)",
        connection=con,
        x=[2.0, 18.0, 18.0, None],
        u=["mmol/L", "mg/dL", "mg/L", "mg/dL"],
    )
    assert got[0] == 2.0
    # oracle: pint, mass concentration / molar mass -> amount concentration
    via_pint = (UREG.Quantity(18.0, "mg/dL") / UREG.Quantity(molar_mass_g_per_mol, "g/mol")).to("mmol/L").magnitude
    assert got[1] == pytest.approx(via_pint, rel=1e-9)
    assert got[2:] == [None, None]


def test_lactate_factor_matches_common_practice(con: duckdb.DuckDBPyConnection) -> None:
    # lactate mg/dL x 0.1110 = mmol/L: domain-methods.md section 11 (common practice)
    assert one(con, "lactate_to_mmol_l(1, 'mg/dL')") == pytest.approx(0.1110, abs=5e-5)


def test_glucose_factor_matches_common_practice(con: duckdb.DuckDBPyConnection) -> None:
    # glucose mg/dL / 18.016 = mmol/L: domain-methods.md section 11 (common practice)
    assert one(con, "glucose_to_mmol_l(99, 'mg/dL')") == pytest.approx(99.0 / 18.016, rel=1e-4)


def test_unit_macros_return_double_for_integer_input(con: duckdb.DuckDBPyConnection) -> None:
    # integer literals must not switch the arithmetic to integer or DECIMAL
    value = one(con, "fio2_to_fraction(21, 'percent')")
    assert isinstance(value, float)
    assert math.isclose(value, 0.21)
