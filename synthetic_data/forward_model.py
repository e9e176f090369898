"""Forward model of the demo data: from a patient's state to what the analyser reports.

Every physiological formula comes from the shared SQL macros in ``sql/macros/`` (one home per
formula); this package only draws random inputs in numpy and combines the macros in the SQL
files beside this module (``synthetic_data/sql/``). The steps, per sample:

1. **Site pressure.** ``barometric_pressure_from_altitude_mmhg`` at the invented hospital's
   altitude, plus a day-to-day weather offset (SD 4 mmHg, clipped at 3 SD).
2. **Inspired oxygen.** Low-flow devices (room air, nasal cannula, simple and reservoir masks):
   the true FiO2 is ``device_fio2_expected(device, flow)`` plus breathing-pattern noise (SD 0.03
   for cannulae, 0.06 simple mask, 0.08 reservoir mask), always kept inside
   ``[device_fio2_min, device_fio2_max]``; the chart shows the expected value. Venturi and
   tracheostomy masks run at the flow ``venturi_min_flow_l_min`` prints for their setting (a
   fifth at 1.5 times that) and deliver the setting or up to 0.02 less. High-flow, CPAP, NIV and
   ventilators deliver the set FiO2, which is also what is charted. So the true FiO2 never
   exceeds the documented FiO2's upper plausible device bound.
3. **Acid-base.** PaCO2 is drawn around the patient's chronic value (CO2 retainers 45-75 mmHg
   with compensated bicarbonate; ventilated patients pulled towards 41 mmHg); bicarbonate falls
   with lactate. pH = ``henderson_hasselbalch_ph(PaCO2, HCO3)``.
4. **Oxygenation.** PAO2 = ``alveolar_po2_simplified_mmhg(FiO2, PaCO2, PB,
   water_vapour_pressure_mmhg(T))`` (R 0.8). PaO2 = (PAO2 - g) * (1 - s), where
   g = ``aa_gradient_expected_mmhg(age)`` times U(0.3, 1.0) is the age-related gradient and
   s = min(0.85, (current lung-disease severity)^1.5 times U(0.5, 1.1)) the share lost to shunt and
   V/Q mismatch. PaO2 is held at least 3 mmHg below PAO2 (so it never exceeds
   ``alveolar_po2_max_mmhg``, the R = 1 bound) and, where PAO2 allows, at least 38 mmHg.
5. **Pulse oximetry.** SpO2 = ``predicted_sao2_pct`` of the arterial blood (shifted as in
   step 7), plus the oximeter's
   error (mean +0.5, SD 1.5, clipped to -3.5..+4 points), rounded and capped at 100. It belongs
   to the patient, so it does not change when the sample is spoiled.
6. **The syringe.** Arterial blood, or for samples really taken from a vein: PO2 38 +/- 6 mmHg
   (22-55, and at least 5 below arterial), PCO2 2-10 mmHg higher, HCO3 1 mmol/L higher.
7. **The analyser** (``analyser_report.sql``) measures pH (2 decimals), PCO2 and PO2 (1
   decimal, mmHg, at 37 C), Hb, Na, K and lactate (the patient's stable baselines plus small
   within-patient noise: Hb SD 0.25 g/dL, Na SD 0.8 mmol/L), and calculates HCO3 with
   ``henderson_hasselbalch_hco3`` from the rounded pH and PCO2, and BE with
   ``base_excess_ecf_mmol_l``. SaO2 is measured by co-oximetry: ``predicted_sao2_pct(PO2, pH,
   37 C, BE)`` (the curve shifted for pH and base excess, read at 37 C because PO2 and pH
   are the analyser's 37 C values, as the derive stage reads it) plus co-oximeter error (SD
   0.7, clipped at 2 points); on samples flagged ``sao2_is_calculated`` (a configurable
   share) it is the curve value itself. Chloride follows from the patient's own anion gap.
8. **Times.** Collected on a whole minute (a morning-round bump around 06:00 UTC), resulted
   2-28 minutes later (log-normal; point-of-care median 4 min, laboratory 11-12 min).

Faults (``faults.py``) change the syringe, the documentation or the transcription, and the
analyser step is re-run where the blood changed.
"""

from __future__ import annotations

from functools import cache
from pathlib import Path

import duckdb
import polars as pl

from pipeline.schema import FIELDS
from pipeline.sql_files import install_macros
from synthetic_data.hospital import LOW_FLOW_DEVICES

SQL_DIR = Path(__file__).resolve().parent / "sql"

REQUIRED_MACROS = (
    "kpa_to_mmhg",
    "mmhg_to_kpa",
    "celsius_to_fahrenheit",
    "pressure_to_mmhg",
    "fio2_to_fraction",
    "hb_to_g_dl",
    "saturation_to_pct",
    "water_vapour_pressure_mmhg",
    "barometric_pressure_from_altitude_mmhg",
    "inspired_po2_mmhg",
    "alveolar_po2_simplified_mmhg",
    "alveolar_po2_max_mmhg",
    "aa_gradient_expected_mmhg",
    "predicted_sao2_pct",
    "henderson_hasselbalch_ph",
    "henderson_hasselbalch_hco3",
    "acid_base_residual",
    "base_excess_ecf_mmol_l",
    "device_fio2_min",
    "device_fio2_max",
    "device_fio2_expected",
    "venturi_min_flow_l_min",
)


@cache
def read_sql(name: str) -> str:
    """Text of ``synthetic_data/sql/<name>``."""
    return (SQL_DIR / name).read_text(encoding="utf-8")


def physiology_connection() -> duckdb.DuckDBPyConnection:
    """An in-memory DuckDB connection with the shared macros installed."""
    try:
        from pipeline.physiology import connect  # type: ignore[import-not-found,unused-ignore]
    except ImportError:
        con = duckdb.connect()
        install_macros(con)
    else:
        con = connect()
    present = {row[0] for row in con.execute(read_sql("installed_macros.sql")).fetchall()}
    missing = [m for m in REQUIRED_MACROS if m not in present]
    if missing:
        raise RuntimeError(
            f"the demo-data generator needs these SQL macros, not installed: {', '.join(missing)}"
        )
    return con


def run_query(
    con: duckdb.DuckDBPyConnection,
    name: str,
    views: dict[str, pl.DataFrame],
    params: dict[str, object] | None = None,
) -> pl.DataFrame:
    """Run ``synthetic_data/sql/<name>`` over polars frames registered under the given view names.

    The queries are projections over their input, so DuckDB keeps the input's row order
    (its default ``preserve_insertion_order``); the ``_row`` column is checked to make sure.
    """
    for view, frame in views.items():
        con.register(view, frame)
    try:
        rel = con.sql(read_sql(name), params=params) if params else con.sql(read_sql(name))
        out = rel.pl()
    finally:
        for view in views:
            con.unregister(view)
    if "_row" in out.columns and out.height > 1 and not out["_row"].is_sorted():
        raise RuntimeError(f"{name}: DuckDB changed the row order")
    return out


FORWARD_INPUTS = (
    "_row",
    "true_device",
    "flow",
    "flow_factor",
    "fio2_set",
    "pb_offset",
    "u_fio2",
    "temperature_c",
    "paco2_true",
    "hco3_true",
    "age_years",
    "u_aa",
    "u_shunt",
    "severity_now",
    "u_spo2",
    "u_venous_po2",
    "u_venous_pco2",
)


def true_state(con: duckdb.DuckDBPyConnection, draws: pl.DataFrame, altitude_m: float) -> pl.DataFrame:
    """Steps 1-6: each sample's true state, the chart beside it and the blood in its syringe.

    Returns ``draws`` with the computed columns added (only numbers cross into DuckDB and back).
    """
    computed = run_query(
        con, "forward_model.sql", {"draws": draws.select(FORWARD_INPUTS)}, {"altitude_m": altitude_m}
    )
    venous = pl.col("sample_type") == "venous"
    return pl.concat([draws, computed.drop("_row")], how="horizontal").with_columns(
        # documentation gaps (a missing device or FiO2 is not a fault)
        pl.when(pl.col("device_missing")).then(None).otherwise(pl.col("true_device")).alias("o2_device"),
        pl.when(pl.col("device_missing")).then(None).otherwise(pl.col("true_flow")).alias("o2_flow_l_min"),
        # a low-flow FiO2 is only an estimate from the device and flow: without the device it is not charted
        pl.when(
            pl.col("fio2_missing")
            | (pl.col("device_missing") & pl.col("true_device").is_in(LOW_FLOW_DEVICES))
        )
        .then(None)
        .otherwise(pl.col("fio2_charted"))
        .alias("fio2"),
        # what is in the syringe: arterial blood, or venous blood when the sample really is venous
        pl.when(venous).then(pl.col("venous_po2")).otherwise(pl.col("pao2_true")).alias("blood_po2"),
        pl.when(venous).then(pl.col("venous_pco2")).otherwise(pl.col("paco2_true")).alias("blood_pco2"),
        pl.when(venous).then(pl.col("venous_hco3")).otherwise(pl.col("hco3_true")).alias("blood_hco3"),
        pl.col("lactate_true").alias("blood_lactate"),
    )


ANALYSER_INPUTS = (
    "_row",
    "blood_po2",
    "blood_pco2",
    "blood_hco3",
    "blood_lactate",
    "baseline_hb",
    "baseline_na",
    "baseline_k",
    "anion_gap",
    "u_hb",
    "u_na",
    "u_k",
    "u_coox",
    "sao2_is_calculated",
    "temperature_c",
)

REPORTED = (
    "ph",
    "paco2_mmhg",
    "pao2_mmhg",
    "hco3_mmol_l",
    "base_excess_mmol_l",
    "sao2_pct",
    "hb_g_dl",
    "na_mmol_l",
    "k_mmol_l",
    "cl_mmol_l",
    "lactate_mmol_l",
)
"""Columns the analyser step writes."""


def analyser_report(con: duckdb.DuckDBPyConnection, state: pl.DataFrame) -> pl.DataFrame:
    """Step 7: the analyser's reported values for the blood in each syringe (``_row`` + REPORTED)."""
    return run_query(con, "analyser_report.sql", {"syringe": state.select(ANALYSER_INPUTS)})


CANONICAL_COLUMNS: tuple[str, ...] = tuple(f.name for f in FIELDS)
STATE_COLUMNS: tuple[str, ...] = tuple(c for c in CANONICAL_COLUMNS if c not in REPORTED)
"""Canonical columns that come from the sample's label and chart rather than from the analyser."""


def assemble_records(state: pl.DataFrame, reported: pl.DataFrame) -> pl.DataFrame:
    """Canonical records (plus ``_row`` and ``source``) from the state and the analyser's report,
    which must be in the same row order."""
    return pl.concat(
        [state.select("_row", "source", *STATE_COLUMNS), reported.select(REPORTED)], how="horizontal"
    ).select("_row", "source", *CANONICAL_COLUMNS)
