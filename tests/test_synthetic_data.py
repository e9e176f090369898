"""The demo-data generator: clean records obey physics, faults land as documented, exports round-trip.

Physics is checked with the shared SQL macros (the one home of each formula). Tolerances come
from domain-methods.md (section numbers given beside each check) or are common practice where
stated. The faulted data set and a fault-free one are generated from the same seed: faults use
their own random stream, so every sample without a fault is identical in both, and each fault
can be checked against the clean value it replaced.
"""

from __future__ import annotations

import csv
import math
import re
import tomllib
from collections.abc import Iterator
from datetime import date, timedelta
from pathlib import Path

import duckdb
import polars as pl
import pytest

from pipeline.physiology import connect
from pipeline.profile import load_profile
from pipeline.schema import FIELDS, OXYGEN_DEVICES, SAMPLE_TYPES
from synthetic_data import DEFAULT_FAULT_RATES, FAULT_TYPES, generate, scale_fault_rates
from synthetic_data.__main__ import main
from synthetic_data.faults import evidence
from synthetic_data.generator import source_of
from synthetic_data.writers import PROFILES_DIR, export_codes, write_exports

ROWS = 12_000
SEED = 11
START = date(2025, 1, 6)
DAYS = 40
# Every fault type at 1 % so that each has enough cases at this size.
RATES = dict.fromkeys(FAULT_TYPES, 0.01)
SET_FIO2_DEVICES = (
    "venturi_mask",
    "high_flow_nasal",
    "cpap",
    "niv",
    "invasive_ventilation",
    "tracheostomy_mask",
)


@pytest.fixture(scope="module")
def con() -> Iterator[duckdb.DuckDBPyConnection]:
    connection = connect()
    yield connection
    connection.close()


@pytest.fixture(scope="module")
def faulty() -> tuple[pl.DataFrame, pl.DataFrame]:
    return generate(ROWS, SEED, START, DAYS, RATES)


@pytest.fixture(scope="module")
def clean() -> pl.DataFrame:
    records, truth = generate(ROWS, SEED, START, DAYS, {})
    assert truth.height == 0
    return records


@pytest.fixture(scope="module")
def clean_in_faulty(faulty: tuple[pl.DataFrame, pl.DataFrame]) -> pl.DataFrame:
    records, truth = faulty
    return records.join(truth.select("sample_id"), on="sample_id", how="anti")


def sql(con: duckdb.DuckDBPyConnection, query: str, **frames: pl.DataFrame) -> pl.DataFrame:
    for name, frame in frames.items():
        con.register(name, frame)
    try:
        return con.sql(query).pl()
    finally:
        for name in frames:
            con.unregister(name)


def pair(faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame, fault: str) -> pl.DataFrame:
    """Faulted records of one fault type beside their clean versions (columns suffixed _clean)."""
    records, truth = faulty
    ids = truth.filter(pl.col("fault_type") == fault)
    out = ids.join(records, on="sample_id").join(clean, on="sample_id", suffix="_clean")
    assert out.height == ids.height > 0
    return out


# --- shape of the records --------------------------------------------------------------------------


def test_records_have_exactly_the_canonical_columns(faulty: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    records, _ = faulty
    assert records.columns == [f.name for f in FIELDS]
    assert records.height == ROWS
    assert records["sample_id"].n_unique() == ROWS
    assert records["patient_id"].str.contains(r"^SVH\d{7}$").all()
    assert set(records["sample_type"].unique()) <= set(SAMPLE_TYPES)
    assert set(records["o2_device"].drop_nulls().unique()) <= set(OXYGEN_DEVICES)
    assert records.schema["collected_at"] == pl.Datetime("us")  # naive UTC
    assert records["collected_at"].min().date() >= START  # type: ignore[union-attr]
    assert records["collected_at"].max().date() < date.fromordinal(START.toordinal() + DAYS)  # type: ignore[union-attr]


def test_samples_repeat_per_patient_across_units_analysers_and_sources(clean: pl.DataFrame) -> None:
    per_patient = clean.group_by("patient_id").agg(
        pl.len().alias("n"), (pl.col("collected_at").max() - pl.col("collected_at").min()).alias("span")
    )
    assert per_patient["n"].max() >= 10  # type: ignore[operator]
    assert (per_patient["span"] > timedelta(days=7)).sum() > 50  # repeated samples over weeks
    assert clean["unit"].n_unique() == 5
    assert clean["analyser_id"].n_unique() >= 8
    sources = clean.select(source_of(pl.col("sample_id")).alias("source"))["source"].value_counts(
        normalize=True
    )
    shares = dict(zip(sources["source"], sources["proportion"], strict=True))
    assert set(shares) == {"eu_style", "us_style", "parquet"}
    assert min(shares.values()) > 0.1
    # each unit has its own device mix: ventilators in intensive care, none on the general medical ward
    vent = clean.group_by("unit").agg((pl.col("o2_device") == "invasive_ventilation").mean().alias("share"))
    ventilated = dict(zip(vent["unit"], vent["share"], strict=True))
    assert ventilated["Heron ICU"] > 0.2
    assert ventilated["Plover General Medical Ward"] == 0.0


def test_haemoglobin_and_sodium_are_stable_within_a_patient(clean: pl.DataFrame) -> None:
    spread = (
        clean.group_by("patient_id")
        .agg(
            pl.col("hb_g_dl").std().alias("hb_sd"),
            pl.col("na_mmol_l").std().alias("na_sd"),
            pl.len().alias("n"),
        )
        .filter(pl.col("n") >= 5)
    )
    # within-patient noise of the generator: Hb SD 0.25 g/dL, Na SD 0.8 mmol/L (plus rounding)
    assert spread["hb_sd"].max() < 0.7  # type: ignore[operator]
    assert spread["na_sd"].max() < 2.0  # type: ignore[operator]
    between = clean.group_by("patient_id").agg(pl.col("hb_g_dl").mean())["hb_g_dl"].std()
    assert between is not None and between > 1.0  # type: ignore[operator]


def test_turnaround_is_mostly_2_to_20_minutes(clean: pl.DataFrame) -> None:
    minutes = (clean["resulted_at"] - clean["collected_at"]).dt.total_minutes()
    assert minutes.min() >= 2  # type: ignore[operator]
    assert minutes.max() <= 28  # type: ignore[operator]
    assert ((minutes >= 2) & (minutes <= 20)).mean() > 0.9  # type: ignore[operator]


def test_same_seed_same_data_other_seed_other_data(faulty: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    again = generate(ROWS, SEED, START, DAYS, RATES)
    assert again[0].equals(faulty[0])
    assert again[1].equals(faulty[1])
    other, _ = generate(ROWS, SEED + 1, START, DAYS, RATES)
    assert not other.equals(faulty[0])


# --- physics of clean records (computed with the shared macros) ---------------------------------------


def test_clean_pao2_never_exceeds_the_alveolar_bound(
    con: duckdb.DuckDBPyConnection, clean: pl.DataFrame
) -> None:
    # domain-methods.md section 3: PaO2 <= FiO2 (PB - PH2O) - PaCO2 (R = 1) at the upper plausible FiO2 of the
    # documented device and flow (section 9); checked here with no tolerance at all.
    checked = sql(
        con,
        f"""
        SELECT pao2_mmhg, alveolar_po2_max_mmhg(
                   CASE WHEN o2_device IN {SET_FIO2_DEVICES} THEN fio2
                        ELSE device_fio2_max(o2_device, o2_flow_l_min) END,
                   paco2_mmhg, barometric_pressure_mmhg) AS bound
        FROM r WHERE sample_type = 'arterial'
        """,
        r=clean,
    ).drop_nulls()
    assert checked.height > 0.9 * clean.filter(pl.col("sample_type") == "arterial").height
    assert (checked["pao2_mmhg"] < checked["bound"]).all()
    # and the generator did produce high PaO2 on oxygen, so the bound is really tested
    assert (checked["pao2_mmhg"] > 200).sum() > 100


def test_clean_acid_base_is_consistent(con: duckdb.DuckDBPyConnection, clean: pl.DataFrame) -> None:
    # domain-methods.md section 6: |pH - pH(Henderson-Hasselbalch)| <= 0.03
    residual = sql(con, "SELECT acid_base_residual(ph, paco2_mmhg, hco3_mmol_l) AS d FROM r", r=clean)["d"]
    assert residual.null_count() == 0
    assert residual.abs().max() <= 0.03  # type: ignore[operator]
    # the analyser calculates HCO3 from the rounded pH and PCO2, so in fact much tighter
    assert residual.abs().max() <= 0.01  # type: ignore[operator]


def test_clean_saturation_is_on_the_curve(con: duckdb.DuckDBPyConnection, clean: pl.DataFrame) -> None:
    # domain-methods.md section 5: measured SaO2 within 4 points of the Severinghaus curve (pH, T, BE shifted)
    out = sql(
        con,
        """
        SELECT sao2_is_calculated, sample_type, spo2_pct,
               sao2_pct - predicted_sao2_pct(pao2_mmhg, ph, 37.0, base_excess_mmol_l) AS d_sao2
        FROM r
        """,
        r=clean,
    )
    measured = out.filter(~pl.col("sao2_is_calculated"))
    assert measured["d_sao2"].abs().max() <= 4.0  # type: ignore[operator]
    assert measured["d_sao2"].abs().mean() > 0.2  # co-oximeter noise is really there
    calculated = out.filter(pl.col("sao2_is_calculated"))
    assert 0.05 < calculated.height / out.height < 0.15  # default share 0.10
    assert calculated["d_sao2"].abs().max() <= 0.06  # the curve itself, rounded to 0.1


def test_clean_spo2_tracks_arterial_saturation(con: duckdb.DuckDBPyConnection, clean: pl.DataFrame) -> None:
    # domain-methods.md section 5: pulse oximeters agree with SaO2 to about +/-4 points
    d = sql(con, "SELECT spo2_pct - sao2_pct AS d FROM r WHERE sample_type = 'arterial'", r=clean)["d"]
    assert d.abs().max() <= 6.5  # oximeter error (<= 4) plus co-oximeter error (<= 2) plus rounding
    assert -1.0 < d.mean() < 2.0  # type: ignore[operator]


def test_clean_documented_fio2_fits_the_documented_device(
    con: duckdb.DuckDBPyConnection, clean: pl.DataFrame
) -> None:
    # domain-methods.md section 9: FiO2 inside the device's plausible range (device_fio2_min/max macros)
    out = sql(
        con,
        "SELECT fio2 BETWEEN device_fio2_min(o2_device, o2_flow_l_min)"
        " AND device_fio2_max(o2_device, o2_flow_l_min) AS ok"
        " FROM r WHERE fio2 IS NOT NULL AND o2_device IS NOT NULL",
        r=clean,
    )
    assert out["ok"].all()
    assert out.height > 0.9 * clean.height


def test_clean_records_carry_no_physical_evidence(
    con: duckdb.DuckDBPyConnection, clean: pl.DataFrame, clean_in_faulty: pl.DataFrame
) -> None:
    for frame in (clean, clean_in_faulty):
        ev = evidence(con, frame)
        assert ev.height == frame.height
        assert not ev["any_evidence"].any(), ev.filter("any_evidence").head()


def test_clean_values_are_physiological(clean: pl.DataFrame) -> None:
    # plausible adult ranges, domain-methods.md section 11 (pressures); pH, Hb, Na ranges common practice
    assert clean["ph"].is_between(6.8, 7.8).all()
    assert clean["paco2_mmhg"].is_between(10, 150).all()
    assert clean["pao2_mmhg"].is_between(20, 700).all()
    assert clean["hb_g_dl"].is_between(5, 20).all()
    assert clean["na_mmol_l"].is_between(115, 165).all()
    assert clean["fio2"].drop_nulls().is_between(0.21, 1.0).all()


# --- faults --------------------------------------------------------------------------------------------


def test_each_fault_type_is_injected_at_its_rate(faulty: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    _, truth = faulty
    counts = dict(truth.group_by("fault_type").len().iter_rows())
    assert set(counts) == set(FAULT_TYPES)
    for fault, rate in RATES.items():
        assert counts[fault] == round(rate * ROWS), fault
    assert truth["sample_id"].n_unique() == truth.height  # at most one fault per sample
    assert truth.columns[:4] == ["sample_id", "fault_type", "detail", "physically_visible"]
    assert truth["detail"].null_count() == 0


def test_samples_without_a_fault_are_untouched(
    faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame, clean_in_faulty: pl.DataFrame
) -> None:
    expected = clean.join(clean_in_faulty.select("sample_id"), on="sample_id", how="semi")
    assert clean_in_faulty.sort("sample_id").equals(expected.sort("sample_id"))
    assert clean_in_faulty.height == ROWS - faulty[1].height


def test_venous_blood_labelled_arterial(
    faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame
) -> None:
    p = pair(faulty, clean, "venous_as_arterial")
    assert (p["sample_type"] == "arterial").all()
    assert (p["pao2_mmhg"] < p["pao2_mmhg_clean"]).all()
    assert (p["pao2_mmhg"] <= 55).all()
    assert (p["paco2_mmhg"] > p["paco2_mmhg_clean"]).all()
    assert (p["spo2_pct"] == p["spo2_pct_clean"]).all()  # the pulse oximeter still reads the patient
    assert p["physically_visible"].mean() > 0.9  # type: ignore[operator]


def test_air_contamination(
    con: duckdb.DuckDBPyConnection, faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame
) -> None:
    p = pair(faulty, clean, "air_contamination")
    # room air PO2 = 0.2095 (PB - PH2O at room temperature), about 150 mmHg at sea level (domain-methods.md
    # section 8)
    air = sql(
        con,
        "SELECT inspired_po2_mmhg(0.2095, barometric_pressure_mmhg, water_vapour_pressure_mmhg(22.0)) AS a"
        " FROM p",
        p=p.select("barometric_pressure_mmhg"),
    )["a"]
    assert air.is_between(145, 160).all()
    before, after = (p["pao2_mmhg_clean"] - air).abs(), (p["pao2_mmhg"] - air).abs()
    assert ((after < before) | (after <= 0.1)).all()  # pulled toward the PO2 of air (0.1: rounding)
    assert (after <= 0.7 * before + 0.1).all()  # at least 30 % of the way
    assert (p["paco2_mmhg"] < p["paco2_mmhg_clean"]).all()
    near_air = p.filter(before < 10)
    assert not near_air["physically_visible"].any()  # nothing to see when PO2 was already near air
    assert p["physically_visible"].any()


def test_fio2_under_documented(faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame) -> None:
    p = pair(faulty, clean, "fio2_under_documented")
    assert (p["o2_device"] == "room_air").all()
    assert (p["fio2"] == 0.21).all()
    assert (p["o2_device_clean"] != "room_air").all()
    assert (p["pao2_mmhg"] == p["pao2_mmhg_clean"]).all()  # the patient did get the oxygen
    assert p["physically_visible"].any() and not p["physically_visible"].all()


def test_fio2_the_device_cannot_deliver(
    con: duckdb.DuckDBPyConnection, faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame
) -> None:
    p = pair(faulty, clean, "fio2_device_mismatch")
    out = sql(
        con,
        "SELECT fio2 NOT BETWEEN device_fio2_min(o2_device, o2_flow_l_min) AND device_fio2_max(o2_device, "
        "o2_flow_l_min) AS outside FROM p",
        p=p.select("fio2", "o2_device", "o2_flow_l_min"),
    )
    assert out["outside"].all()
    assert (p["pao2_mmhg"] == p["pao2_mmhg_clean"]).all()
    assert p["physically_visible"].all()


def test_ph_transcription(
    con: duckdb.DuckDBPyConnection, faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame
) -> None:
    p = pair(faulty, clean, "ph_transcription")
    assert (p["ph"] != p["ph_clean"]).all()
    assert (p["paco2_mmhg"] == p["paco2_mmhg_clean"]).all()
    assert (p["hco3_mmol_l"] == p["hco3_mmol_l_clean"]).all()
    assert (p["value_before"] == p["ph_clean"]).all() and (p["value_after"] == p["ph"]).all()
    big = (p["ph"] - p["ph_clean"]).abs() > 0.03 + 1e-9
    # domain-methods.md section 6: an error above 0.03 shows in the Henderson-Hasselbalch residual
    assert (p["physically_visible"] == big).all()
    assert big.any() and not big.all()


def test_wrong_unit(
    con: duckdb.DuckDBPyConnection, faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame
) -> None:
    p = pair(faulty, clean, "wrong_unit").with_columns(source_of(pl.col("sample_id")).alias("source"))
    converted = sql(
        con,
        "SELECT CASE WHEN source = 'eu_style' THEN kpa_to_mmhg(value_before)"
        " ELSE mmhg_to_kpa(value_before) END AS expected, value_after, source, field FROM p",
        p=p.select("source", "value_before", "value_after", "field"),
    )
    # kPa numbers are written with one decimal: 0.05 kPa is 0.375 mmHg (section 11: 1 kPa = 7.50062 mmHg)
    tolerance = pl.when(pl.col("source") == "eu_style").then(0.05 * 7.50062 + 1e-6).otherwise(0.05 + 1e-9)
    assert converted.select(((pl.col("expected") - pl.col("value_after")).abs() <= tolerance).all()).item()
    for name in ("pao2_mmhg", "paco2_mmhg"):
        hit = p.filter(pl.col("field") == name)
        assert hit.height > 0
        assert (hit[name] == hit["value_after"]).all()
        assert (hit[f"{name}_clean"] == hit["value_before"]).all()


def test_wrong_blood_in_tube(faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame) -> None:
    p = pair(faulty, clean, "wrong_blood_in_tube")
    analytes = ["ph", "paco2_mmhg", "pao2_mmhg", "hb_g_dl", "na_mmol_l", "k_mmol_l", "lactate_mmol_l"]
    donors = p.select("sample_id", "patient_id", *analytes).join(
        clean.select(pl.col("patient_id").alias("donor_patient"), *analytes), on=analytes, nulls_equal=True
    )
    # every analyte set is another patient's clean sample
    assert donors.filter(pl.col("donor_patient") != pl.col("patient_id"))["sample_id"].n_unique() == p.height
    assert (p["spo2_pct"] == p["spo2_pct_clean"]).all()
    assert (p["patient_id"] == p["patient_id_clean"]).all()


def test_late_analysis(faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame) -> None:
    p = pair(faulty, clean, "late_analysis")
    minutes = (p["resulted_at"] - p["collected_at"]).dt.total_minutes()
    assert minutes.is_between(45, 180).all()
    assert (p["pao2_mmhg"] < p["pao2_mmhg_clean"]).all()
    assert (p["paco2_mmhg"] > p["paco2_mmhg_clean"]).all()
    assert (p["lactate_mmol_l"] > p["lactate_mmol_l_clean"]).all()
    assert p["physically_visible"].all()


def test_decimal_slip(faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame) -> None:
    p = pair(faulty, clean, "decimal_slip")
    ratio = p["value_after"] / p["value_before"]
    assert (((ratio - 10).abs() < 0.01) | ((ratio - 0.1).abs() < 0.001 + 0.005 / p["value_before"])).all()
    for name in p["field"].unique():
        hit = p.filter(pl.col("field") == name)
        assert (hit[name] == hit["value_after"]).all()
    assert p["physically_visible"].mean() > 0.5  # type: ignore[operator]


def test_exported_twice_and_corrected_resend_keep_the_final_record(
    faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame
) -> None:
    columns = [f.name for f in FIELDS]
    for fault in ("duplicate_export", "corrected_resend"):
        p = pair(faulty, clean, fault)
        assert p.select(columns).equals(
            p.select(pl.col(f"{c}_clean" if c != "sample_id" else c).alias(c) for c in columns)
        )
        assert p["resend_delay_days"].is_between(1, 3).all()
    corrected = pair(faulty, clean, "corrected_resend")
    assert (corrected["value_before"] != corrected["value_after"]).all()


def test_text_results(faulty: tuple[pl.DataFrame, pl.DataFrame], clean: pl.DataFrame) -> None:
    p = pair(faulty, clean, "text_result")
    assert set(p["cell_text"]) == {"haemolysed", "clotted", "see comment"}
    for name in p["field"].unique():
        hit = p.filter(pl.col("field") == name)
        assert hit[name].null_count() == hit.height
        assert hit[f"{name}_clean"].null_count() == 0
    assert p.select(source_of(pl.col("sample_id")).is_in(["eu_style", "us_style"]).all()).item()


def test_scaled_fault_rates_keep_the_mix() -> None:
    scaled = scale_fault_rates(0.02)
    assert math.isclose(sum(scaled.values()), 0.02)
    total = sum(DEFAULT_FAULT_RATES.values())
    for name, rate in DEFAULT_FAULT_RATES.items():
        assert math.isclose(scaled[name], rate * 0.02 / total)
    with pytest.raises(ValueError, match="unknown fault types"):
        generate(100, 1, fault_rates={"gremlins": 0.1})


# --- exports -----------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def exported(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, pl.DataFrame, pl.DataFrame]:
    records, truth = generate(6_000, SEED, START, 20, RATES)
    out = tmp_path_factory.mktemp("exports")
    write_exports(records, truth, out)
    return out, records, truth


def read_csv_rows(path: Path, profile_name: str) -> tuple[list[str], list[list[str]]]:
    profile = load_profile(PROFILES_DIR / f"{profile_name}.toml")
    with path.open(encoding=profile.encoding, newline="") as handle:
        rows = list(csv.reader(handle, delimiter=profile.delimiter, quotechar=profile.quote_char))
    return rows[0], rows[1:]


@pytest.mark.parametrize("source", ["us_style", "eu_style"])
def test_csv_exports_round_trip_through_the_csv_module(
    exported: tuple[Path, pl.DataFrame, pl.DataFrame], source: str
) -> None:
    out, records, truth = exported
    profile = load_profile(PROFILES_DIR / f"demo_{source}.toml")
    files = sorted((out / source).glob("export_*.csv"))
    assert len(files) >= 20
    assert all(re.fullmatch(r"export_\d{4}-\d{2}-\d{2}\.csv", f.name) for f in files)
    seen: list[str] = []
    for path in files:
        header, rows = read_csv_rows(path, f"demo_{source}")
        assert header == list(profile.columns.values())
        assert all(len(row) == len(header) for row in rows)
        seen.extend(row[0] for row in rows)
    expected = records.filter(source_of(pl.col("sample_id")) == source)["sample_id"]
    resent = truth.filter(pl.col("fault_type").is_in(["duplicate_export", "corrected_resend"]))
    resent_here = resent.join(expected.to_frame(), on="sample_id", how="semi")
    assert len(seen) == expected.len() + resent_here.height
    assert set(seen) == set(expected)


def test_eu_export_is_latin_1_with_decimal_commas(exported: tuple[Path, pl.DataFrame, pl.DataFrame]) -> None:
    out, _, _ = exported
    path = sorted((out / "eu_style").glob("*.csv"))[3]
    raw = path.read_bytes()
    with pytest.raises(UnicodeDecodeError):
        raw.decode("utf-8")  # "Gerät" in Latin-1 is not valid UTF-8
    header, rows = read_csv_rows(path, "demo_eu_style")
    assert "Gerät" in header
    ph = header.index("pH")
    assert all(re.fullmatch(r"\d,\d\d", row[ph]) for row in rows if row[ph])
    taken = header.index("Entnahme")
    assert all(re.fullmatch(r"\d\d\.\d\d\.\d{4} \d\d:\d\d", row[taken]) for row in rows)


def test_exported_values_convert_back_to_the_record(
    con: duckdb.DuckDBPyConnection, exported: tuple[Path, pl.DataFrame, pl.DataFrame]
) -> None:
    out, records, truth = exported
    faulted = set(truth["sample_id"])
    us_header, us_rows = read_csv_rows(sorted((out / "us_style").glob("*.csv"))[5], "demo_us_style")
    eu_header, eu_rows = read_csv_rows(sorted((out / "eu_style").glob("*.csv"))[5], "demo_eu_style")
    by_id = {row["sample_id"]: row for row in records.iter_rows(named=True)}
    checked = 0
    for row in us_rows:
        rec = by_id[row[0]]
        if row[0] in faulted:
            continue
        cell = dict(zip(us_header, row, strict=True))
        assert float(cell["pO2"]) == pytest.approx(rec["pao2_mmhg"], abs=0.05)
        assert float(cell["FiO2 (%)"] or "nan") == pytest.approx(
            (rec["fio2"] or math.nan) * 100, abs=0.5, nan_ok=True
        )
        celsius = con.execute("SELECT fahrenheit_to_celsius(?)", [float(cell["Temp (F)"])]).fetchall()[0][0]
        assert celsius == pytest.approx(rec["temperature_c"], abs=0.06)
        assert cell["Specimen"] in {"ART", "VEN", "UNK"}
        checked += 1
    for row in eu_rows:
        rec = by_id[row[0]]
        if row[0] in faulted:
            continue
        cell = dict(zip(eu_header, row, strict=True))
        mmhg = con.execute("SELECT kpa_to_mmhg(?)", [float(cell["pCO2"].replace(",", "."))]).fetchall()[0][0]
        assert mmhg == pytest.approx(rec["paco2_mmhg"], abs=0.04)  # kPa printed with 2 decimals
        assert float(cell["Hb"]) == pytest.approx(rec["hb_g_dl"] * 10, abs=0.5)  # g/L
        assert cell["Geburtsdatum"] != ""
        checked += 1
    assert checked > 50


def test_codes_are_written_in_the_profiles_own_spelling() -> None:
    for name in ("demo_us_style", "demo_eu_style"):
        path = PROFILES_DIR / f"{name}.toml"
        sample_codes, device_codes = export_codes(path)
        raw = tomllib.loads(path.read_text(encoding="utf-8"))["codes"]
        assert all(code in raw["sample_type"] for code in sample_codes.values())
        assert all(code in raw["o2_device"] for code in device_codes.values())
    assert export_codes(PROFILES_DIR / "demo_us_style.toml")[0]["arterial"] == "ART"  # the first listed


def test_ground_truth_keys_are_in_the_exports(exported: tuple[Path, pl.DataFrame, pl.DataFrame]) -> None:
    out, _, truth = exported
    written = pl.read_parquet(out / "ground_truth.parquet")
    assert written.equals(truth)
    assert pl.read_csv(out / "ground_truth.csv").height == truth.height
    cells: dict[str, list[dict[str, str]]] = {}
    for source in ("us_style", "eu_style"):
        for path in (out / source).glob("*.csv"):
            header, rows = read_csv_rows(path, f"demo_{source}")
            for row in rows:
                cells.setdefault(row[0], []).append(dict(zip(header, row, strict=True)))
    parquet = pl.concat([pl.read_parquet(p) for p in (out / "parquet").glob("*.parquet")])
    for sample_id in parquet["sample_id"]:
        cells.setdefault(sample_id, []).append({})
    assert set(truth["sample_id"]) <= set(cells)
    for fault in ("duplicate_export", "corrected_resend"):
        for sample_id in truth.filter(pl.col("fault_type") == fault)["sample_id"]:
            assert len(cells[sample_id]) == 2, (fault, sample_id)
    # a text result stands in its cell as text
    us_column = {"k_mmol_l": "K", "pao2_mmhg": "pO2", "lactate_mmol_l": "Lactate"}
    eu_column = {"k_mmol_l": "K", "pao2_mmhg": "pO2", "lactate_mmol_l": "Laktat"}
    for row in truth.filter(pl.col("fault_type") == "text_result").iter_rows(named=True):
        (cell,) = cells[row["sample_id"]]
        column = (us_column if row["sample_id"].startswith("LAB") else eu_column)[row["field"]]
        assert cell[column] == row["cell_text"]
    assert "invented" in (out / "README.txt").read_text(encoding="utf-8")


def test_a_correction_is_first_written_with_its_first_sent_value(
    con: duckdb.DuckDBPyConnection, exported: tuple[Path, pl.DataFrame, pl.DataFrame]
) -> None:
    out, _, truth = exported
    to_canonical = {
        "pao2_mmhg": "pressure_to_mmhg",
        "fio2": "fio2_to_fraction",
        "temperature_c": "temperature_to_c",
    }
    # the rounding of each printed value, in canonical units
    tolerance = {"pao2_mmhg": 0.05, "fio2": 0.0051, "temperature_c": 0.06}
    checked = 0
    for source in ("us_style", "eu_style"):
        profile = load_profile(PROFILES_DIR / f"demo_{source}.toml")
        copies: dict[str, list[dict[str, str]]] = {}
        for path in sorted((out / source).glob("*.csv")):  # file names sort by date
            header, rows = read_csv_rows(path, f"demo_{source}")
            for row in rows:
                copies.setdefault(row[0], []).append(dict(zip(header, row, strict=True)))
        for fix in truth.filter(pl.col("fault_type") == "corrected_resend").iter_rows(named=True):
            if fix["sample_id"] not in copies:
                continue
            first, second = copies[fix["sample_id"]]
            name = fix["field"]
            for cell, expected in ((first, fix["value_before"]), (second, fix["value_after"])):
                text = cell[profile.columns[name]].replace(",", ".")
                value = con.execute(
                    f"SELECT {to_canonical[name]}(?, ?)", [float(text), profile.unit_of(name)]
                ).fetchall()[0][0]
                assert value == pytest.approx(expected, abs=tolerance[name]), (source, fix)
            checked += 1
    assert checked >= 20


def test_parquet_export_has_canonical_names_units_and_utc(
    exported: tuple[Path, pl.DataFrame, pl.DataFrame],
) -> None:
    out, records, truth = exported
    profile = load_profile(PROFILES_DIR / "demo_parquet.toml")
    frame = pl.concat([pl.read_parquet(p) for p in sorted((out / "parquet").glob("*.parquet"))])
    assert frame.columns == list(profile.columns.values())
    assert frame.schema["collected_at"] == pl.Datetime("us")
    corrected = truth.filter(pl.col("fault_type") == "corrected_resend").select("sample_id")
    original = (
        frame.unique("sample_id", keep="first")
        .join(corrected, on="sample_id", how="anti")
        .join(records, on="sample_id", suffix="_r")
    )
    assert original.height > 500
    assert (original["pao2_mmhg"] == original["pao2_mmhg_r"]).all()
    assert (original["collected_at"] == original["collected_at_r"]).all()


def test_single_file_layout(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("synthetic_data.writers.BATCH_ROWS", 300)  # several batches into one file
    records, truth = generate(2_000, 3, START, 10, RATES)
    written = write_exports(records, truth, tmp_path, single_file=True)
    assert {k: [p.name for p in v] for k, v in written.items()} == {
        "us_style": ["export_all.csv"],
        "eu_style": ["export_all.csv"],
        "parquet": ["export_all.parquet"],
    }
    header, rows = read_csv_rows(tmp_path / "eu_style" / "export_all.csv", "demo_eu_style")
    eu = records.filter(pl.col("sample_id").str.starts_with("POC"))
    resent = truth.filter(pl.col("fault_type").is_in(["duplicate_export", "corrected_resend"]))
    assert eu.height > 600  # more than two batches
    assert len(rows) == eu.height + resent.join(eu, on="sample_id", how="semi").height
    assert header[0] == "Probennummer" and all(row[0] != "Probennummer" for row in rows)  # one header


# --- command line ------------------------------------------------------------------------------------


def test_command_line_writes_the_demo_set(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--rows", "3000", "--seed", "5", "--days", "10", "--out", str(tmp_path / "demo")]) == 0
    printed = capsys.readouterr().out
    assert "3000 records" in printed and "invented" in printed
    assert (tmp_path / "demo" / "ground_truth.parquet").exists()
    assert any((tmp_path / "demo" / "us_style").glob("export_*.csv"))
    assert main(["--rows", "500", "--fault-rate", "0", "--out", str(tmp_path / "clean")]) == 0
    assert pl.read_parquet(tmp_path / "clean" / "ground_truth.parquet").height == 0


def test_command_line_help_and_bad_input(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as done:
        main(["--help"])
    assert done.value.code == 0
    text = capsys.readouterr().out
    assert "invented" in text and "--fault-rate" in text and "air_contamination" in text
    with pytest.raises(SystemExit) as done:
        main(["--out", "x", "--fault-rate", "2"])
    assert done.value.code == 2
    assert "between 0 and 0.5" in capsys.readouterr().err
