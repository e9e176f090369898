"""Physiology macros (sql/macros/20_physiology.sql), and the rules every macro file keeps.

Check values come from domain-methods.md (the project's reference sheet, which names each
published source and its status) or from PyPI oracles (iapws, fluids, ambiance). Each one
says where it comes from beside it.
"""

from __future__ import annotations

import itertools
import math
import re
from pathlib import Path

import ambiance
import duckdb
import pytest
from fluids.atmosphere import ATMOSPHERE_1976
from hypothesis import given, settings
from hypothesis import strategies as st
from iapws import IAPWS97

from pipeline.physiology import connect, evaluate
from pipeline.schema import OXYGEN_DEVICES
from pipeline.sql_files import SQL_DIR, install_macros

MACRO_FILES = sorted((SQL_DIR / "macros").glob("*.sql"))
TEST_FILES = [
    Path(__file__).with_name(name)
    for name in ("test_units.py", "test_physiology.py", "test_devices.py", "test_audit.py", "test_funnel.py")
]
MACRO_RE = re.compile(
    r"CREATE\s+(?:OR\s+REPLACE\s+)?(?:TEMP(?:ORARY)?\s+)?MACRO\s+(\w+)\s*\(([^)]*)\)\s*AS", re.IGNORECASE
)
PA_PER_MMHG = 133.322387415  # conventional mmHg, domain-methods.md section 11 [V]


@pytest.fixture(scope="module")
def con() -> duckdb.DuckDBPyConnection:
    return connect()


def one(con: duckdb.DuckDBPyConnection, sql_expression: str, **columns: object) -> object:
    (value,) = evaluate(sql_expression, connection=con, **columns)
    return value


def declared_macros() -> dict[str, tuple[Path, list[str], str]]:
    """name -> (file, parameter list as written, comment block above the CREATE)."""
    found: dict[str, tuple[Path, list[str], str]] = {}
    for path in MACRO_FILES:
        text = path.read_text(encoding="utf-8")
        for match in MACRO_RE.finditer(text):
            lines_above = text[: match.start()].splitlines()
            comment: list[str] = []
            while lines_above and lines_above[-1].startswith("--"):
                comment.insert(0, lines_above.pop())
            params = [p.strip() for p in match.group(2).split(",") if p.strip()]
            found[match.group(1).lower()] = (path, params, "\n".join(comment))
    return found


MACROS = declared_macros()


# ---- rules every macro file keeps -------------------------------------------------------------


def test_macro_files_exist_in_dependency_order() -> None:
    assert [p.name for p in MACRO_FILES] == ["10_units.sql", "20_physiology.sql", "30_devices.sql", "40_statistics.sql"]
    assert len(MACROS) >= 45


@pytest.mark.parametrize("path", MACRO_FILES, ids=lambda p: p.name)
def test_every_macro_file_opens_with_a_comment(path: Path) -> None:
    assert path.read_text(encoding="utf-8").startswith("-- ")


@pytest.mark.parametrize("name", sorted(MACROS))
def test_every_macro_documents_formula_units_domain_source_status(name: str) -> None:
    _, _, comment = MACROS[name]
    for label in ("Formula:", "Units:", "Valid:", "Source:", "Status:"):
        line = next((line for line in comment.splitlines() if label in line), "")
        assert line.split(label, 1)[-1].strip(), f"{name}: no {label} line in its comment"
    assert comment.startswith(f"-- {name}("), f"{name}: comment does not start with the macro's name"


def test_every_macro_is_exercised_by_a_test() -> None:
    sources = "\n".join(path.read_text(encoding="utf-8") for path in TEST_FILES).lower()
    missing = [name for name in MACROS if f"{name}(" not in sources]
    assert not missing, f"macros without a test: {missing}"


def test_installed_macros_are_exactly_the_declared_ones(con: duckdb.DuckDBPyConnection) -> None:
    rows = con.execute(
        "SELECT function_name FROM duckdb_functions() WHERE function_type = 'macro' AND database_name = 'temp'"
    ).fetchall()
    assert {name for (name,) in rows} == set(MACROS)


def test_installing_twice_replaces_the_macros(con: duckdb.DuckDBPyConnection) -> None:
    install_macros(con)
    assert one(con, "pf_ratio(80, 0.4)") == pytest.approx(200.0)  # domain-methods.md section 4 [V]


def test_macros_install_on_a_read_only_database(tmp_path: Path) -> None:
    # the store may be opened read-only for reporting; installing the macros must not write to it
    path = tmp_path / "store.duckdb"
    duckdb.connect(str(path)).close()
    with duckdb.connect(str(path), read_only=True) as con:
        install_macros(con)
        assert con.execute("SELECT pf_ratio(80, 0.4)").fetchall() == [(200.0,)]  # domain-methods.md section 4 [V]


@pytest.mark.parametrize("path", MACRO_FILES, ids=lambda p: p.name)
def test_macro_files_keep_to_portable_sql(path: Path) -> None:
    code = "\n".join(line.split("--", 1)[0] for line in path.read_text(encoding="utf-8").splitlines())
    for construct in ("::", "lambda", "->", "list_", "struct_", "python"):
        assert construct not in code.lower(), f"{path.name} uses {construct!r}"


# ---- NULL in, NULL out; no error, inf or NaN anywhere -----------------------------------------

STRING_PARAMS = {
    "unit": ["mmHg", "kPa", "fraction", "percent", "C", "F", "g/dL", "g/L", "mmol/L", "mg/dL", "zzz"],
    "method": ["age_over_4_plus_4", "age_plus_10_over_4", "mellemgaard_1966", "zzz"],
    "device": [*OXYGEN_DEVICES, "zzz"],
    "overdispersion": ["none", "additive", "multiplicative", "zzz"],
}
EDGE_NUMBERS = [0.0, -1.0, 0.5, 100.0]


def _param_name(param: str) -> str:
    return param.split(":=")[0].strip()


def _literal(value: object) -> str:
    if value is None:
        return "NULL"
    if isinstance(value, str):
        return "'" + value + "'"
    return repr(float(value))


@pytest.mark.parametrize("name", sorted(MACROS))
def test_all_null_arguments_give_null(con: duckdb.DuckDBPyConnection, name: str) -> None:
    _, params, _ = MACROS[name]
    call = f"{name}({', '.join('NULL' for _ in params)})"
    assert one(con, call) is None


@pytest.mark.parametrize("name", sorted(MACROS))
def test_edge_inputs_never_raise_or_give_inf_or_nan(con: duckdb.DuckDBPyConnection, name: str) -> None:
    _, params, _ = MACROS[name]
    names = [_param_name(p) for p in params]
    tables = [
        f"(VALUES {', '.join(f'({_literal(v)})' for v in [*STRING_PARAMS.get(n, EDGE_NUMBERS), None])}) a{i}(v)"
        for i, n in enumerate(names)
    ]
    args = ", ".join(f"a{i}.v" for i in range(len(names)))
    rows = con.execute(f"SELECT {args}, {name}({args}) FROM {' CROSS JOIN '.join(tables)}").fetchall()
    expected_rows = math.prod(len(STRING_PARAMS.get(n, EDGE_NUMBERS)) + 1 for n in names)
    assert len(rows) == expected_rows
    bad = [row for row in rows if isinstance(row[-1], float) and not math.isfinite(row[-1])]
    assert not bad, bad[:5]


# One valid call per macro with required arguments; NULL in any required argument must give NULL.
VALID_ARGUMENTS: dict[str, dict[str, str]] = {
    "water_vapour_pressure_mmhg": {"temp_c": "37"},
    "barometric_pressure_from_altitude_mmhg": {"altitude_m": "1600"},
    "inspired_po2_mmhg": {"fio2": "0.21", "pb_mmhg": "760"},
    "alveolar_po2_simplified_mmhg": {"fio2": "0.21", "paco2_mmhg": "40"},
    "alveolar_po2_full_mmhg": {"fio2": "0.21", "paco2_mmhg": "40"},
    "alveolar_po2_max_mmhg": {"fio2": "0.21", "paco2_mmhg": "40"},
    "aa_gradient_mmhg": {"alveolar_po2": "99.73", "pao2": "95"},
    "aa_gradient_expected_mmhg": {"age_years": "40"},
    "arterial_alveolar_ratio": {"pao2": "95", "alveolar_po2": "99.73"},
    "a_over_a_ratio": {"pao2": "95", "alveolar_po2": "99.73"},
    "pf_ratio": {"pao2_mmhg": "80", "fio2": "0.4"},
    "pf_ratio_altitude_adjusted": {"pf": "200", "pb_mmhg": "626.5"},
    "berlin_band": {"pf": "150"},
    "berlin_peep_met": {"peep_cmh2o": "5"},
    "sf_ratio": {"spo2_pct": "92", "fio2": "0.36"},
    "sf_from_pf": {"pf": "300"},
    "pf_from_sf": {"sf": "235"},
    "oxygenation_index": {"fio2": "0.6", "mean_airway_pressure_cmh2o": "20", "pao2_mmhg": "60"},
    "severinghaus_saturation_pct": {"po2_mmhg": "60"},
    "severinghaus_po2_mmhg": {"saturation_pct": "90"},
    "virtual_po2_mmhg": {"po2": "60"},
    "predicted_sao2_pct": {"po2": "60"},
    "henderson_hasselbalch_ph": {"paco2_mmhg": "40", "hco3": "24"},
    "henderson_hasselbalch_hco3": {"ph": "7.4", "paco2_mmhg": "40"},
    "acid_base_residual": {"ph": "7.4", "paco2_mmhg": "40", "hco3": "24"},
    "base_excess_blood_mmol_l": {"ph": "7.2", "hco3": "15", "hb_g_dl": "15"},
    "base_excess_ecf_mmol_l": {"ph": "7.2", "hco3": "15"},
    "winters_expected_paco2_mmhg": {"hco3": "12"},
    "anion_gap": {"na": "140", "cl": "104", "hco3": "24"},
    "ph_at_temperature": {"ph37": "7.4", "temp_c": "39"},
    "pco2_at_temperature_mmhg": {"pco2_37": "40", "temp_c": "39"},
    "po2_at_temperature_mmhg": {"po2_37": "80", "temp_c": "39"},
    "reference_change_value_pct": {"cv_analytical_pct": "1.5", "cv_within_subject_pct": "2.7"},
    "delta_check_limit": {"level": "14", "cv_analytical_pct": "1.5", "cv_within_subject_pct": "2.7",
                          "rate_per_hour": "0.15", "hours": "2"},
    "saturation_with_p50_shift_pct": {"po2": "60", "p50_shift_mmhg": "4"},
}


@pytest.mark.parametrize(("name", "arg"), [(n, a) for n, args in VALID_ARGUMENTS.items() for a in args])
def test_null_in_any_required_argument_gives_null(con: duckdb.DuckDBPyConnection, name: str, arg: str) -> None:
    args = VALID_ARGUMENTS[name]
    assert one(con, f"{name}({', '.join(args.values())})") is not None
    nulled = [("NULL" if key == arg else value) for key, value in args.items()]
    assert one(con, f"{name}({', '.join(nulled)})") is None


def test_every_physiology_macro_has_a_valid_call() -> None:
    in_file = {name for name, (path, _, _) in MACROS.items() if path.name == "20_physiology.sql"}
    # COALESCE by design: a missing recorded pressure falls back to the site's; a dyshaemoglobin that is not
    # reported counts as 0 (and a missing saturation still gives NULL, checked here)
    assert in_file - set(VALID_ARGUMENTS) == {"effective_barometric_pressure_mmhg", "functional_saturation_pct"}
    con = connect()
    assert one(con, "functional_saturation_pct(NULL, 20.0, 1.0)") is None


# ---- water vapour pressure --------------------------------------------------------------------


@pytest.mark.parametrize("temp_c", [15.0, 20.0, 25.0, 30.0, 33.0, 35.0, 37.0, 39.0, 40.0, 42.0, 44.0, 46.0])
def test_water_vapour_pressure_matches_iapws(con: duckdb.DuckDBPyConnection, temp_c: float) -> None:
    expected = IAPWS97(T=temp_c + 273.15, x=0).P * 1e6 / PA_PER_MMHG  # oracle: iapws (IAPWS-IF97)
    assert one(con, "water_vapour_pressure_mmhg(t)", t=[temp_c]) == pytest.approx(expected, rel=1e-3)


@pytest.mark.parametrize(
    ("temp_c", "expected"),
    # Buck 1981 column of the table in domain-methods.md section 1 [P]
    [(30, 31.84), (35, 42.20), (37, 47.10), (39, 52.49), (40, 55.37), (42, 61.56)],
)
def test_water_vapour_pressure_table(con: duckdb.DuckDBPyConnection, temp_c: float, expected: float) -> None:
    assert one(con, "water_vapour_pressure_mmhg(t)", t=[temp_c]) == pytest.approx(expected, abs=0.01)


def test_water_vapour_pressure_clinical_constant(con: duckdb.DuckDBPyConnection) -> None:
    # 47 mmHg at 37 C, the clinical constant: domain-methods.md section 1 [V]
    assert one(con, "water_vapour_pressure_mmhg(37)") == pytest.approx(47.0, abs=0.2)


def test_water_vapour_pressure_outside_liquid_range_is_null(con: duckdb.DuckDBPyConnection) -> None:
    assert evaluate("water_vapour_pressure_mmhg(t)", connection=con, t=[-1.0, 101.0]) == [None, None]


# ---- barometric pressure ----------------------------------------------------------------------

ALTITUDES = [-500.0, 0.0, 500.0, 1000.0, 1600.0, 2000.0, 3000.0, 4000.0, 5000.0, 8000.0, 11000.0]


@pytest.mark.parametrize("altitude_m", ALTITUDES)
def test_barometric_pressure_matches_fluids(con: duckdb.DuckDBPyConnection, altitude_m: float) -> None:
    expected = ATMOSPHERE_1976(Z=altitude_m).P / PA_PER_MMHG  # oracle: fluids (US Standard Atmosphere 1976)
    got = one(con, "barometric_pressure_from_altitude_mmhg(h)", h=[altitude_m])
    assert got == pytest.approx(expected, abs=0.01)


@pytest.mark.parametrize("altitude_m", ALTITUDES)
def test_barometric_pressure_matches_ambiance(con: duckdb.DuckDBPyConnection, altitude_m: float) -> None:
    expected = float(ambiance.Atmosphere(altitude_m).pressure[0]) / PA_PER_MMHG  # oracle: ambiance (ICAO 1993)
    got = one(con, "barometric_pressure_from_altitude_mmhg(h)", h=[altitude_m])
    assert got == pytest.approx(expected, abs=0.01)


@pytest.mark.parametrize(
    ("altitude_m", "expected"),
    # domain-methods.md section 2 table [V], tolerance 0.5 mmHg as stated there
    [(0, 760.0), (1000, 674.1), (1600, 626.5), (2000, 596.3), (3000, 525.9), (5000, 405.2)],
)
def test_barometric_pressure_table(con: duckdb.DuckDBPyConnection, altitude_m: float, expected: float) -> None:
    assert one(con, "barometric_pressure_from_altitude_mmhg(h)", h=[altitude_m]) == pytest.approx(expected, abs=0.5)


def test_barometric_pressure_outside_troposphere_is_null(con: duckdb.DuckDBPyConnection) -> None:
    assert evaluate("barometric_pressure_from_altitude_mmhg(h)", connection=con, h=[-700.0, 12000.0]) == [
        None,
        None,
    ]


def test_effective_barometric_pressure_prefers_record_then_site_then_altitude(
    con: duckdb.DuckDBPyConnection,
) -> None:
    got = evaluate(
        "effective_barometric_pressure_mmhg(r, s, a)",
        connection=con,
        r=[740.0, None, None, None],
        s=[700.0, 700.0, None, None],
        a=[1600.0, 1600.0, 1600.0, None],
    )
    assert got[:2] == [740.0, 700.0]
    assert got[2] == pytest.approx(626.5, abs=0.5)  # 1600 m, domain-methods.md section 2 [V]
    assert got[3] is None


# ---- inspired and alveolar PO2 ----------------------------------------------------------------


@pytest.mark.parametrize(
    ("fio2", "pb", "expected"),
    # domain-methods.md section 1 checks [V], abs tol 0.01
    [(0.21, 760.0, 149.73), (0.21, 626.5, 121.70), (1.0, 760.0, 713.0)],
)
def test_inspired_po2_checks(con: duckdb.DuckDBPyConnection, fio2: float, pb: float, expected: float) -> None:
    assert one(con, "inspired_po2_mmhg(f, p)", f=[fio2], p=[pb]) == pytest.approx(expected, abs=0.01)


def test_facts_of_the_trade_for_air_at_sea_level(con: duckdb.DuckDBPyConnection) -> None:
    # common practice: 21 % O2 / 79 % N2 at 760 mmHg -> ambient PO2 ~160, PN2 ~600 mmHg (dry gas, Dalton)
    assert one(con, "inspired_po2_mmhg(0.21, 760, ph2o_mmhg := 0)") == pytest.approx(160.0, abs=1.0)
    assert one(con, "inspired_po2_mmhg(0.79, 760, ph2o_mmhg := 0)") == pytest.approx(600.0, abs=1.0)
    # common practice: humidified at 37 C (47 mmHg) -> inspired PO2 ~150, PN2 ~563 mmHg
    assert one(con, "inspired_po2_mmhg(0.21, 760)") == pytest.approx(150.0, abs=1.0)
    assert one(con, "inspired_po2_mmhg(0.79, 760)") == pytest.approx(563.0, abs=1.0)
    # common practice: PaCO2 40 mmHg, R 0.8 -> alveolar PO2 ~100 mmHg
    assert one(con, "alveolar_po2_simplified_mmhg(0.21, 40)") == pytest.approx(100.0, abs=1.0)


def test_inspired_po2_needs_pressure_above_vapour_pressure(con: duckdb.DuckDBPyConnection) -> None:
    assert evaluate("inspired_po2_mmhg(0.21, p)", connection=con, p=[47.0, 30.0]) == [None, None]


ALVEOLAR_TABLE = [
    # domain-methods.md section 3 table (PH2O 47, R 0.8) [V]: fio2, pb, paco2, simplified, full
    (0.21, 760.0, 40.0, 99.73, 101.83),
    (0.50, 760.0, 40.0, 306.50, 311.50),
    (1.00, 760.0, 40.0, 663.00, 673.00),
    (0.21, 630.0, 36.0, 77.43, 79.32),
    (0.21, 526.0, 34.0, 58.09, 59.87),
    (0.21, 760.0, 80.0, 49.73, 53.93),
]


@pytest.mark.parametrize(("fio2", "pb", "paco2", "simplified", "full"), ALVEOLAR_TABLE)
def test_alveolar_gas_equation_table(
    con: duckdb.DuckDBPyConnection, fio2: float, pb: float, paco2: float, simplified: float, full: float
) -> None:
    cols = {"f": [fio2], "p": [pb], "c": [paco2]}
    assert one(con, "alveolar_po2_simplified_mmhg(f, c, pb_mmhg := p)", **cols) == pytest.approx(simplified, abs=0.05)
    assert one(con, "alveolar_po2_full_mmhg(f, c, pb_mmhg := p)", **cols) == pytest.approx(full, abs=0.05)


def test_alveolar_max_example(con: duckdb.DuckDBPyConnection) -> None:
    # nasal cannula 2 L/min (FiO2 <= 0.35), PB 760, PaCO2 40 -> PAO2_max 209.6: domain-methods.md section 3 [CP]
    # (the sheet gives one decimal, so allow its rounding)
    assert one(con, "alveolar_po2_max_mmhg(0.35, 40)") == pytest.approx(209.6, abs=0.051)


def test_full_form_equals_max_at_fio2_one(con: duckdb.DuckDBPyConnection) -> None:
    # at FiO2 1.0 the CO2 term of the full form is PaCO2 x 1: domain-methods.md section 3 [V]
    assert one(con, "alveolar_po2_full_mmhg(1.0, 40)") == pytest.approx(one(con, "alveolar_po2_max_mmhg(1.0, 40)"))


def test_respiratory_quotient_and_pressures_are_settings(con: duckdb.DuckDBPyConnection) -> None:
    # R = 1 makes all three forms equal (algebra of the Fenn, Rahn & Otis 1946 forms)
    forms = [
        one(con, "alveolar_po2_simplified_mmhg(0.4, 45, rq := 1.0)"),
        one(con, "alveolar_po2_full_mmhg(0.4, 45, rq := 1.0)"),
        one(con, "alveolar_po2_max_mmhg(0.4, 45)"),
    ]
    assert forms == pytest.approx([forms[2]] * 3)
    # the 0.21 / 526 mmHg / PaCO2 34 row of domain-methods.md section 3 [V], given positionally
    assert one(con, "alveolar_po2_simplified_mmhg(0.21, 34, 526, 47, 0.8)") == pytest.approx(58.09, abs=0.05)
    assert one(con, "alveolar_po2_simplified_mmhg(0.21, 40, rq := 0)") is None


GAS = st.fixed_dictionaries(
    {
        "fio2": st.floats(0.21, 1.0),
        "paco2": st.floats(10.0, 150.0),
        "pb": st.floats(300.0, 800.0),
        "rq": st.floats(0.7, 1.0),
        "step": st.floats(0.01, 50.0),
    }
)


@settings(max_examples=40, deadline=None)
@given(st.lists(GAS, min_size=1, max_size=40))
def test_alveolar_po2_rises_with_fio2_and_pressure_and_falls_with_paco2(
    points: list[dict[str, float]],
) -> None:
    cols = {k: [p[k] for p in points] for k in ("fio2", "paco2", "pb", "rq", "step")}
    for form in ("simplified", "full"):
        base = f"alveolar_po2_{form}_mmhg(fio2, paco2, pb, 47.0, rq)"
        values = evaluate(
            f"[{base}, alveolar_po2_{form}_mmhg(least(fio2 + step / 100, 1.0), paco2, pb, 47.0, rq),"
            f" alveolar_po2_{form}_mmhg(fio2, paco2, pb + step, 47.0, rq),"
            f" alveolar_po2_{form}_mmhg(fio2, paco2 + step, pb, 47.0, rq)]",
            **cols,
        )
        for (v, more_o2, more_pb, more_co2), fio2, step in zip(values, cols["fio2"], cols["step"], strict=True):
            # a FiO2 within rounding of 1.0 cannot rise measurably (the change is below one float step)
            if min(fio2 + step / 100, 1.0) - fio2 > 1e-9:
                assert more_o2 > v
            assert more_pb > v
            assert more_co2 < v


@settings(max_examples=40, deadline=None)
@given(st.lists(GAS, min_size=1, max_size=40))
def test_alveolar_forms_are_ordered(points: list[dict[str, float]]) -> None:
    # with R <= 1: simplified <= full <= max (algebra of the Fenn, Rahn & Otis 1946 forms)
    cols = {k: [p[k] for p in points] for k in ("fio2", "paco2", "pb", "rq")}
    rows = evaluate(
        "[alveolar_po2_simplified_mmhg(fio2, paco2, pb, 47.0, rq), alveolar_po2_full_mmhg(fio2, paco2, pb, 47.0, rq),"
        " alveolar_po2_max_mmhg(fio2, paco2, pb)]",
        **cols,
    )
    for simplified, full, upper in rows:
        assert simplified <= full + 1e-9
        assert full <= upper + 1e-9


# ---- A-a gradient, a/A, P/F, S/F, OI ----------------------------------------------------------


def test_aa_gradient_checks(con: duckdb.DuckDBPyConnection) -> None:
    # FiO2 0.21, PB 760, PaCO2 40, PaO2 95 -> 4.73 (simplified) / 6.83 (full): domain-methods.md section 4 [V]
    assert one(con, "aa_gradient_mmhg(alveolar_po2_simplified_mmhg(0.21, 40), 95)") == pytest.approx(4.73, abs=0.01)
    assert one(con, "aa_gradient_mmhg(alveolar_po2_full_mmhg(0.21, 40), 95)") == pytest.approx(6.83, abs=0.01)


@pytest.mark.parametrize(
    ("method", "expected"),
    # domain-methods.md section 4 table, ages 20 / 40 / 70 / 85: age/4+4 and (age+10)/4 common practice;
    # 2.5 + 0.21 age Mellemgaard 1966, Acta Physiol Scand [P]
    [
        ("age_over_4_plus_4", [9.0, 14.0, 21.5, 25.25]),
        ("age_plus_10_over_4", [7.5, 12.5, 20.0, 23.75]),
        ("mellemgaard_1966", [6.7, 10.9, 17.2, 20.35]),
    ],
)
def test_aa_gradient_expected_table(con: duckdb.DuckDBPyConnection, method: str, expected: list[float]) -> None:
    got = evaluate("aa_gradient_expected_mmhg(age, method := m)", connection=con, age=[20, 40, 70, 85], m=method)
    assert got == pytest.approx(expected, abs=0.01)


def test_aa_gradient_expected_default_and_unknown_method(con: duckdb.DuckDBPyConnection) -> None:
    # default age/4 + 4 (docs/formulas.md); age 40 -> 14.0, domain-methods.md section 4 (common practice)
    assert one(con, "aa_gradient_expected_mmhg(40)") == pytest.approx(14.0)
    assert one(con, "aa_gradient_expected_mmhg(40, 'no_such_method')") is None
    assert one(con, "aa_gradient_expected_mmhg(-1)") is None


def test_young_adult_aa_gradient_is_5_to_10(con: duckdb.DuckDBPyConnection) -> None:
    # common practice: a young adult's A-a gradient on room air is about 5-10 mmHg
    for method in STRING_PARAMS["method"][:3]:
        for age in (18, 20, 24):
            assert 5.0 <= one(con, f"aa_gradient_expected_mmhg({age}, '{method}')") <= 10.0


@settings(max_examples=30, deadline=None)
@given(st.lists(st.integers(0, 110), min_size=2, max_size=30, unique=True))
def test_aa_gradient_expected_rises_with_age(ages: list[int]) -> None:
    # common practice: the normal A-a gradient rises with age
    ages = sorted(ages)
    for method in STRING_PARAMS["method"][:3]:
        limits = evaluate("aa_gradient_expected_mmhg(age, m)", age=ages, m=method)
        assert all(a < b for a, b in itertools.pairwise(limits))


def test_arterial_alveolar_ratio(con: duckdb.DuckDBPyConnection) -> None:
    # 95 / 99.73 = 0.9526: domain-methods.md section 4 [V]
    assert one(con, "arterial_alveolar_ratio(95, 99.73)") == pytest.approx(0.9526, abs=1e-4)
    assert one(con, "a_over_A_ratio(95, 99.73)") == pytest.approx(0.9526, abs=1e-4)
    assert one(con, "a_over_a_ratio(95, 0)") is None


def test_pf_ratio_and_berlin_bands(con: duckdb.DuckDBPyConnection) -> None:
    # 80 / 0.40 = 200 -> moderate; 300 mild; 300.1 none; 100 severe: domain-methods.md section 4
    # (ARDS Definition Task Force, Ranieri 2012, JAMA) [V]
    assert one(con, "pf_ratio(80, 0.40)") == pytest.approx(200.0)
    assert one(con, "berlin_band(pf_ratio(80, 0.40))") == "moderate"
    got = evaluate("berlin_band(pf)", connection=con, pf=[300.0, 300.1, 100.0, 100.1, 200.1, 0.0, -5.0])
    assert got == ["mild", "none", "severe", "moderate", "mild", "severe", None]
    assert one(con, "pf_ratio(80, 0)") is None


def test_berlin_peep_precondition(con: duckdb.DuckDBPyConnection) -> None:
    # bands apply with PEEP or CPAP >= 5 cmH2O: Ranieri 2012, JAMA [V]
    assert evaluate("berlin_peep_met(p)", connection=con, p=[5.0, 4.9, 12.0, None]) == [
        True,
        False,
        True,
        None,
    ]


def test_pf_ratio_altitude_adjustment(con: duckdb.DuckDBPyConnection) -> None:
    # P/F x (PB / 760): Ranieri 2012, JAMA [V]; identity at 760 mmHg
    assert one(con, "pf_ratio_altitude_adjusted(250, 760)") == pytest.approx(250.0)
    assert one(con, "pf_ratio_altitude_adjusted(200, 626.5)") == pytest.approx(200 * 626.5 / 760)


def test_sf_ratio_and_rice_relation(con: duckdb.DuckDBPyConnection) -> None:
    # SpO2 92 % on FiO2 0.36 -> 255.6; Rice 2007 Chest: P/F 300 -> 316, 200 -> 232; S/F 235 -> 203.6
    # (domain-methods.md section 4 [P])
    assert one(con, "sf_ratio(92, 0.36)") == pytest.approx(255.6, abs=0.05)
    assert one(con, "sf_from_pf(300)") == pytest.approx(316.0)
    assert one(con, "sf_from_pf(200)") == pytest.approx(232.0)
    assert one(con, "pf_from_sf(235)") == pytest.approx(203.6, abs=0.05)
    assert one(con, "pf_from_sf(sf_from_pf(187.5))") == pytest.approx(187.5)
    assert one(con, "sf_ratio(92, 0)") is None


def test_oxygenation_index(con: duckdb.DuckDBPyConnection) -> None:
    # 0.6 x 20 x 100 / 60 = 20.0: domain-methods.md section 4 [V]
    assert one(con, "oxygenation_index(0.6, 20, 60)") == pytest.approx(20.0)
    assert one(con, "oxygenation_index(0.6, 20, 0)") is None


# ---- oxygen dissociation curve ----------------------------------------------------------------


@pytest.mark.parametrize(
    ("po2", "saturation"),
    # Severinghaus 1979 equation, domain-methods.md section 5 check table [V], tol 0.01
    [
        (20, 31.98),
        (26.8, 49.86),
        (30, 57.38),
        (40, 74.95),
        (50, 84.99),
        (60, 90.58),
        (70, 93.79),
        (80, 95.73),
        (90, 96.95),
        (100, 97.75),
        (150, 99.32),
    ],
)
def test_severinghaus_saturation_checks(con: duckdb.DuckDBPyConnection, po2: float, saturation: float) -> None:
    assert one(con, "severinghaus_saturation_pct(p)", p=[po2]) == pytest.approx(saturation, abs=0.01)


@pytest.mark.parametrize(
    ("po2", "published"),
    # standard human curve, Severinghaus 1979 J Appl Physiol Table 1 (domain-methods.md section 5 [V]):
    # the equation stays within 0.55 saturation points of it
    [(40, 74.69), (50, 85.08), (60, 90.85), (70, 94.06), (80, 95.84), (90, 96.88), (100, 97.49)],
)
def test_severinghaus_equation_follows_published_curve(
    con: duckdb.DuckDBPyConnection, po2: float, published: float
) -> None:
    assert one(con, "severinghaus_saturation_pct(p)", p=[po2]) == pytest.approx(published, abs=0.55)


@pytest.mark.parametrize(
    ("saturation", "po2"),
    # exact inverse: domain-methods.md section 5 [V]
    [(50, 26.86), (90, 58.66), (95, 75.67), (98, 104.19)],
)
def test_severinghaus_inverse_checks(con: duckdb.DuckDBPyConnection, saturation: float, po2: float) -> None:
    assert one(con, "severinghaus_po2_mmhg(s)", s=[saturation]) == pytest.approx(po2, abs=0.01)


def test_severinghaus_domain_edges(con: duckdb.DuckDBPyConnection) -> None:
    assert one(con, "severinghaus_saturation_pct(0)") == 0.0
    assert one(con, "severinghaus_saturation_pct(-1)") is None
    assert evaluate("severinghaus_po2_mmhg(s)", connection=con, s=[0.0, 100.0, -3.0, 101.0]) == [None] * 4


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(0.01, 700.0), min_size=2, max_size=40, unique=True))
def test_severinghaus_is_monotone_and_the_inverse_round_trips(po2s: list[float]) -> None:
    po2s = sorted(po2s)
    saturations = evaluate("severinghaus_saturation_pct(p)", p=po2s)
    for (p1, s1), (p2, s2) in itertools.pairwise(zip(po2s, saturations, strict=True)):
        assert s1 <= s2
        if p2 - p1 > 1e-6 * p2:
            assert s1 < s2
    back = evaluate("severinghaus_po2_mmhg(severinghaus_saturation_pct(p))", p=po2s)
    assert back == pytest.approx(po2s, rel=1e-6)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(0.1, 99.9), min_size=1, max_size=40))
def test_severinghaus_saturation_round_trips(saturations: list[float]) -> None:
    back = evaluate("severinghaus_saturation_pct(severinghaus_po2_mmhg(s))", s=saturations)
    assert back == pytest.approx(saturations, rel=1e-9, abs=1e-9)


@pytest.mark.parametrize(
    ("args", "virtual", "saturation"),
    # PO2 60 mmHg, Severinghaus 1979 virtual PO2: domain-methods.md section 5 [P]
    [
        ("ph := 7.20", 48.10, 83.51),
        ("ph := 7.50", 67.01, 93.0),
        ("temp_c := 39", 53.72, 87.45),
        ("base_excess := -10", 61.82, 91.3),
    ],
)
def test_virtual_po2_and_predicted_saturation(
    con: duckdb.DuckDBPyConnection, args: str, virtual: float, saturation: float
) -> None:
    assert one(con, f"virtual_po2_mmhg(60, {args})") == pytest.approx(virtual, abs=0.01)
    assert one(con, f"predicted_sao2_pct(60, {args})") == pytest.approx(saturation, abs=0.01)


def test_predicted_saturation_at_standard_conditions_is_the_curve(con: duckdb.DuckDBPyConnection) -> None:
    # standard conditions (37 C, pH 7.40, BE 0) leave PO2 unchanged (Severinghaus 1979)
    assert one(con, "virtual_po2_mmhg(60)") == pytest.approx(60.0)
    assert one(con, "predicted_sao2_pct(60, 7.40, 37.0, 0.0)") == pytest.approx(90.58, abs=0.01)  # section 5 [V]
    # venous example: PaO2 40 -> predicted SO2 74.9 %, domain-methods.md section 8 [CP]
    assert one(con, "predicted_sao2_pct(40)") == pytest.approx(74.9, abs=0.05)


# ---- acid-base --------------------------------------------------------------------------------

HH_TABLE = [
    # domain-methods.md section 6 table [V]: pH, PCO2, HCO3, pH_calc pK 6.1, pH_calc pK 6.095, flagged at 0.03
    (7.40, 40.0, 24.0, 7.391, 7.386, False),
    (7.20, 60.0, 23.0, 7.196, 7.191, False),
    (7.40, 40.0, 14.0, 7.157, 7.152, True),
    (7.40, 5.3, 24.0, 8.269, 8.264, True),
    (7.10, 20.0, 6.0, 7.090, 7.085, False),
]


@pytest.mark.parametrize(("ph", "pco2", "hco3", "ph61", "ph6095", "flagged"), HH_TABLE)
def test_henderson_hasselbalch_table(
    con: duckdb.DuckDBPyConnection,
    ph: float,
    pco2: float,
    hco3: float,
    ph61: float,
    ph6095: float,
    flagged: bool,
) -> None:
    cols = {"ph": [ph], "c": [pco2], "b": [hco3]}
    assert one(con, "henderson_hasselbalch_ph(c, b)", **cols) == pytest.approx(ph61, abs=0.001)
    assert one(con, "henderson_hasselbalch_ph(c, b, pk := 6.095)", **cols) == pytest.approx(ph6095, abs=0.001)
    residual = one(con, "acid_base_residual(ph, c, b)", **cols)
    assert (abs(residual) > 0.03) is flagged  # tolerance 0.03: domain-methods.md section 6 (common practice)


@pytest.mark.parametrize(
    ("ph", "pco2", "hco3_61", "hco3_6095"),
    # domain-methods.md section 6 [V], tol 0.01
    [(7.40, 40.0, 24.50, 24.79), (7.20, 60.0, 23.19, 23.46), (7.55, 25.0, 21.63, 21.88)],
)
def test_henderson_hasselbalch_hco3(
    con: duckdb.DuckDBPyConnection, ph: float, pco2: float, hco3_61: float, hco3_6095: float
) -> None:
    cols = {"ph": [ph], "c": [pco2]}
    assert one(con, "henderson_hasselbalch_hco3(ph, c)", **cols) == pytest.approx(hco3_61, abs=0.01)
    assert one(con, "henderson_hasselbalch_hco3(ph, c, 6.095)", **cols) == pytest.approx(hco3_6095, abs=0.01)


def test_kpa_pco2_resolved_by_henderson_hasselbalch(con: duckdb.DuckDBPyConnection) -> None:
    # pH 7.40, PCO2 5.3 read as kPa (39.75 mmHg), HCO3 24 -> pH_calc 7.394: domain-methods.md section 11 [CP]
    assert one(con, "henderson_hasselbalch_ph(kpa_to_mmhg(5.3), 24)") == pytest.approx(7.394, abs=0.001)


def test_henderson_hasselbalch_round_trip_and_domain(con: duckdb.DuckDBPyConnection) -> None:
    got = one(con, "henderson_hasselbalch_ph(55, henderson_hasselbalch_hco3(7.31, 55))")
    assert got == pytest.approx(7.31, abs=1e-12)
    assert evaluate("henderson_hasselbalch_ph(c, b)", connection=con, c=[0.0, 40.0], b=[24.0, 0.0]) == [
        None,
        None,
    ]


def test_base_excess(con: duckdb.DuckDBPyConnection) -> None:
    # CLSI C46-A formulas, domain-methods.md section 6 [V]: pH 7.40 / HCO3 24.8 -> 0 / 0;
    # pH 7.20, HCO3 15, Hb 15 -> BE(B) -12.35, BE(ecf) -13.04
    assert one(con, "base_excess_blood_mmol_l(7.40, 24.8, 15)") == pytest.approx(0.0, abs=1e-9)
    assert one(con, "base_excess_ecf_mmol_l(7.40, 24.8)") == pytest.approx(0.0, abs=1e-9)
    assert one(con, "base_excess_blood_mmol_l(7.20, 15, 15)") == pytest.approx(-12.35, abs=0.01)
    assert one(con, "base_excess_ecf_mmol_l(7.20, 15)") == pytest.approx(-13.04, abs=0.01)


def test_winters_formula(con: duckdb.DuckDBPyConnection) -> None:
    # HCO3 12 -> 26 (24-28): Albert, Dell & Winters 1967, domain-methods.md section 6 [V]
    assert one(con, "winters_expected_paco2_mmhg(12)") == pytest.approx(26.0)


def test_anion_gap(con: duckdb.DuckDBPyConnection) -> None:
    # Na 140, Cl 104, HCO3 24 -> 12; with K 4 -> 16: domain-methods.md section 6 [V]
    assert one(con, "anion_gap(140, 104, 24)") == pytest.approx(12.0)
    assert one(con, "anion_gap(140, 104, 24, k := 4)") == pytest.approx(16.0)
    assert one(con, "anion_gap(140, 104, 24, 4)") == pytest.approx(16.0)


# ---- temperature correction -------------------------------------------------------------------


@pytest.mark.parametrize(
    ("ph37", "temp_c", "expected"),
    # domain-methods.md section 7 [V], tol 0.001
    [(7.40, 39, 7.3706), (7.40, 33, 7.4588), (7.20, 33, 7.2536), (7.60, 40, 7.5520)],
)
def test_ph_at_temperature(con: duckdb.DuckDBPyConnection, ph37: float, temp_c: float, expected: float) -> None:
    assert one(con, "ph_at_temperature(p, t)", p=[ph37], t=[temp_c]) == pytest.approx(expected, abs=0.001)


@pytest.mark.parametrize(
    ("pco2", "temp_c", "expected"),
    [(40, 39, 43.66), (40, 33, 33.58)],  # Nunn 1965 coefficient, domain-methods.md section 7 [V], tol 0.05
)
def test_pco2_at_temperature(con: duckdb.DuckDBPyConnection, pco2: float, temp_c: float, expected: float) -> None:
    assert one(con, "pco2_at_temperature_mmhg(p, t)", p=[pco2], t=[temp_c]) == pytest.approx(expected, abs=0.05)


@pytest.mark.parametrize(
    ("po2", "temp_c", "expected"),
    # Severinghaus 1979 equation 3, domain-methods.md section 7 [V], tol 0.05
    [(80, 39, 91.23), (80, 33, 61.51), (200, 39, 210.54), (40, 35, 34.73)],
)
def test_po2_at_temperature(con: duckdb.DuckDBPyConnection, po2: float, temp_c: float, expected: float) -> None:
    assert one(con, "po2_at_temperature_mmhg(p, t)", p=[po2], t=[temp_c]) == pytest.approx(expected, abs=0.05)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.tuples(st.floats(6.8, 7.8), st.floats(10.0, 150.0), st.floats(0.0, 700.0)), min_size=1, max_size=30))
def test_temperature_correction_is_identity_at_37(values: list[tuple[float, float, float]]) -> None:
    ph, pco2, po2 = (list(column) for column in zip(*values, strict=True))
    rows = evaluate(
        "[ph_at_temperature(ph, 37), pco2_at_temperature_mmhg(pco2, 37), po2_at_temperature_mmhg(po2, 37)]",
        ph=ph,
        pco2=pco2,
        po2=po2,
    )
    for got, expected in zip(rows, values, strict=True):
        assert got == pytest.approx(list(expected), rel=1e-12, abs=1e-12)


# ---- delta checks -----------------------------------------------------------------------------


def test_reference_change_value(con: duckdb.DuckDBPyConnection) -> None:
    # domain-methods.md section 8 [V]: Hb CVa 1.5 %, CVi 2.7 % -> 8.56 %; Na 0.7 / 0.5 -> 2.38 % (one-sided 2.00 %)
    assert one(con, "reference_change_value_pct(1.5, 2.7)") == pytest.approx(8.56, abs=0.01)
    assert one(con, "reference_change_value_pct(0.7, 0.5)") == pytest.approx(2.38, abs=0.01)
    assert one(con, "reference_change_value_pct(0.7, 0.5, z := 1.645)") == pytest.approx(2.00, abs=0.01)


def test_delta_check_limit(con: duckdb.DuckDBPyConnection) -> None:
    # RCV 8.56 % of 14 g/dL = 1.199 g/dL (domain-methods.md section 8 check value); plus 0.15 g/dL per hour for
    # 2 h (the catalogue's time allowance) = 1.499; NULL for a negative interval.
    assert one(con, "delta_check_limit(14.0, 1.5, 2.7, 0.0, 0.0)") == pytest.approx(14.0 * 0.0856141, rel=1e-5)
    assert one(con, "delta_check_limit(14.0, 1.5, 2.7, 0.15, 2.0)") == pytest.approx(1.1986 + 0.30, abs=1e-3)
    assert one(con, "delta_check_limit(-14.0, 1.5, 2.7, 0.0, 0.0)") == pytest.approx(1.1986, abs=1e-3)
    assert one(con, "delta_check_limit(14.0, 1.5, 2.7, 0.15, -1.0)") is None


# ---- co-oximetry and curve shifts ---------------------------------------------------------------


def test_functional_saturation(con: duckdb.DuckDBPyConnection) -> None:
    # fractional = functional x (1 - FCOHb - FMetHb) (domain-methods.md section 5): FO2Hb 72 % with COHb 20 % is
    # functional 90 %; with COHb 15 % and MetHb 5 % also 90 %; no dyshaemoglobin reported: unchanged.
    assert one(con, "functional_saturation_pct(72.0, 20.0, NULL)") == pytest.approx(90.0)
    assert one(con, "functional_saturation_pct(72.0, 15.0, 5.0)") == pytest.approx(90.0)
    assert one(con, "functional_saturation_pct(95.0, NULL, NULL)") == pytest.approx(95.0)
    assert one(con, "functional_saturation_pct(50.0, 60.0, 40.0)") is None


def test_saturation_with_p50_shift(con: duckdb.DuckDBPyConnection) -> None:
    # Severinghaus 1979 check values (domain-methods.md section 5): 26.8 mmHg -> 49.86 %, 60 -> 90.58 %.
    # A curve with P50 30.8 (shift +4) reads 30.8 mmHg as the standard curve reads 26.8; one with P50 22.8
    # (shift -4) reads 22.8 mmHg so.
    assert one(con, "saturation_with_p50_shift_pct(60.0, 0.0)") == pytest.approx(90.58, abs=0.01)
    assert one(con, "saturation_with_p50_shift_pct(30.8, 4.0)") == pytest.approx(49.86, abs=0.01)
    assert one(con, "saturation_with_p50_shift_pct(22.8, -4.0)") == pytest.approx(49.86, abs=0.01)
    assert one(con, "saturation_with_p50_shift_pct(60.0, -30.0)") is None
