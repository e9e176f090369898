"""Write the demo records as the invented hospital's exports, one mapping profile per source.

Samples are split between export sources by analyser (``hospital.ANALYSER_SOURCE``; the
source is also the ``sample_id`` prefix): critical-care point-of-care analysers export
European-style CSV, the main laboratory US-style CSV, ward satellite analysers a Parquet
feed. Each source writes one file per day (the local date on which the result was produced,
in the profile's time zone), or one file in all with ``single_file``:

    OUT/us_style/export_YYYY-MM-DD.csv     profiles/demo_us_style.toml
    OUT/eu_style/export_YYYY-MM-DD.csv     profiles/demo_eu_style.toml
    OUT/parquet/export_YYYY-MM-DD.parquet  profiles/demo_parquet.toml
    OUT/ground_truth.parquet, OUT/ground_truth.csv      injected faults
    OUT/lookalikes.parquet, OUT/lookalikes.csv          clinical look-alikes (no fault)
    OUT/README.txt

Values are converted from canonical units into each profile's declared units with the
generator's own conversion factors (``physics.py``: 1 kPa = 7.50062 mmHg, degrees Fahrenheit,
g/L, mmol/L of haem iron, mg/dL of lactate and glucose), printed with the profile's decimal mark
and date-time format in its local time zone, and coded with the profile's own sample-type and
device codes. The European-style CSV (critical-care point-of-care co-oximeters) and the Parquet
feed carry glucose, COHb and MetHb; the US-style CSV does not.
Faults that live in the export are written here from the ground truth: a duplicate is written
again in a later day's file, a correction is written first with its first-sent value and again,
corrected, in a later file, and a text result replaces the number in its cell.
"""

from __future__ import annotations

import io
import tomllib
from datetime import date
from pathlib import Path
from typing import BinaryIO

import polars as pl

from pipeline.profile import Profile, load_profile
from pipeline.schema import FIELDS_BY_NAME, Kind
from synthetic_data import physics as phys
from synthetic_data.generator import LOOKALIKE_SCHEMA, source_of
from synthetic_data.hospital import PROFILE_FILES, SITE_NAME, SOURCES

PROFILES_DIR = Path(__file__).resolve().parent.parent / "profiles"

# Decimals printed per canonical column and declared unit (what analysers typically print).
DECIMALS: dict[str, dict[str, int]] = {
    "paco2_mmhg": {"mmHg": 1, "kPa": 2},
    "pao2_mmhg": {"mmHg": 1, "kPa": 2},
    "barometric_pressure_mmhg": {"mmHg": 1, "kPa": 2},
    "fio2": {"fraction": 2, "percent": 0},
    "sao2_pct": {"percent": 1, "fraction": 3},
    "spo2_pct": {"percent": 0, "fraction": 2},
    "temperature_c": {"C": 1, "F": 1},
    "hb_g_dl": {"g/dL": 1, "g/L": 0, "mmol/L": 1},
    "lactate_mmol_l": {"mmol/L": 1, "mg/dL": 0},
    "glucose_mmol_l": {"mmol/L": 1, "mg/dL": 0},
    "cohb_pct": {"percent": 1, "fraction": 3},
    "methb_pct": {"percent": 1, "fraction": 3},
    "age_years": {"years": 0},
    "o2_flow_l_min": {"L/min": 1},
    "ph": {"pH": 2},
    "hco3_mmol_l": {"mmol/L": 1},
    "base_excess_mmol_l": {"mmol/L": 1},
    "na_mmol_l": {"mmol/L": 0},
    "k_mmol_l": {"mmol/L": 1},
    "cl_mmol_l": {"mmol/L": 0},
    "mean_airway_pressure_cmh2o": {"cmH2O": 0},
    "peep_cmh2o": {"cmH2O": 0},
    "target_spo2_low_pct": {"percent": 0, "fraction": 2},
    "target_spo2_high_pct": {"percent": 0, "fraction": 2},
}
CONVERTED = (
    "paco2_mmhg",
    "pao2_mmhg",
    "barometric_pressure_mmhg",
    "fio2",
    "sao2_pct",
    "spo2_pct",
    "temperature_c",
    "hb_g_dl",
    "lactate_mmol_l",
    "glucose_mmol_l",
    "cohb_pct",
    "methb_pct",
    "target_spo2_low_pct",
    "target_spo2_high_pct",
)
BATCH_ROWS = 250_000
"""Rows turned into text at a time when one large file is written."""
BOOLEAN_TEXT: dict[str, tuple[str, str]] = {"demo_us_style": ("Y", "N"), "demo_eu_style": ("1", "0")}


def profile_path(source: str, profiles_dir: Path = PROFILES_DIR) -> Path:
    return profiles_dir / PROFILE_FILES[source]


def export_codes(path: Path) -> dict[str, dict[str, str]]:
    """Per code field (``[codes.<field>]``): canonical -> export code, in the TOML file's own spelling.

    Where a profile lists several codes for one canonical value, the first is written.
    """
    raw = tomllib.loads(path.read_text(encoding="utf-8")).get("codes", {})
    out: dict[str, dict[str, str]] = {}
    for table, codes in raw.items():
        reverse: dict[str, str] = {}
        for code, canonical in codes.items():
            reverse.setdefault(str(canonical), str(code))
        out[str(table)] = reverse
    return out


HB_MMOL_L_PER_G_DL = 0.6206
"""Haemoglobin in mmol/L of haem iron per g/dL (monomer molar mass 16 114 g/mol; domain-methods.md
section 11)."""
_FACTORS: dict[str, dict[str, float]] = {
    # canonical value x factor = value in the declared unit
    "pressure": {"mmHg": 1.0, "kPa": 1.0 / phys.MMHG_PER_KPA},
    "fraction": {"fraction": 1.0, "percent": 100.0},
    "saturation": {"percent": 1.0, "fraction": 0.01},
    "haemoglobin": {"g/dL": 1.0, "g/L": 10.0, "mmol/L": HB_MMOL_L_PER_G_DL},
    "lactate": {"mmol/L": 1.0, "mg/dL": phys.LACTATE_MG_DL_PER_MMOL_L},
    "glucose": {"mmol/L": 1.0, "mg/dL": phys.GLUCOSE_MG_DL_PER_MMOL_L},
    "flow": {"L/min": 1.0},
}


def _units(profile: Profile) -> dict[str, str]:
    units = {c: profile.unit_of(c) for c in CONVERTED if c in profile.columns}
    for name, unit in units.items():
        if unit not in DECIMALS[name]:
            raise ValueError(f"{profile.name}: the demo writer cannot write {name} in {unit!r}")
    return units


def to_unit(expr: pl.Expr, name: str, unit: str) -> pl.Expr:
    """A canonical column expressed in a declared unit (temperature has an offset; the rest are factors)."""
    if name == "temperature_c":
        return expr * 1.8 + 32.0 if unit == "F" else expr
    family = FIELDS_BY_NAME[name].unit_family or ""
    return expr * _FACTORS[family][unit]


def _to_profile_units(rows: pl.DataFrame, profile: Profile) -> pl.DataFrame:
    return rows.with_columns(to_unit(pl.col(name), name, unit).alias(name) for name, unit in _units(profile).items())


def _export_rows(rows: pl.DataFrame, truth: pl.DataFrame, timezone: str) -> pl.DataFrame:
    """Rows as exported: each on the local date it was resulted, plus re-sent copies later."""
    rows = rows.with_columns(
        pl.col("resulted_at")
        .dt.replace_time_zone("UTC")
        .dt.convert_time_zone(timezone)
        .dt.date()
        .alias("_export_date"),
        pl.lit(0, dtype=pl.Int8).alias("_copy"),
    )
    resent = truth.filter(pl.col("fault_type").is_in(["duplicate_export", "corrected_resend"])).select(
        "sample_id", "fault_type", "field", "value_before", "resend_delay_days"
    )
    later = (
        rows.join(resent, on="sample_id", how="inner")
        .with_columns(
            (pl.col("_export_date") + pl.duration(days=pl.col("resend_delay_days"))).alias("_export_date"),
            pl.lit(1, dtype=pl.Int8).alias("_copy"),
        )
        .select(rows.columns)
    )
    # a corrected sample was first sent with another value
    first = resent.filter(pl.col("fault_type") == "corrected_resend").select(
        "sample_id", pl.col("field").alias("_first_field"), pl.col("value_before").alias("_first_value")
    )
    rows = rows.join(first, on="sample_id", how="left", maintain_order="left")
    fields = first["_first_field"].unique().to_list()
    rows = rows.with_columns(
        pl.when(pl.col("_first_field") == name).then(pl.col("_first_value")).otherwise(pl.col(name)).alias(name)
        for name in fields
    ).drop("_first_field", "_first_value")
    # file order: by export day, re-sent copies after the day's own results, then by result time; one
    # integer key sorts much faster than four columns, and a stable sort keeps ties in generation order
    day = pl.col("_export_date").cast(pl.Int32).cast(pl.Int64)
    minute = pl.col("resulted_at").dt.epoch("s") // 60
    key = (day * 2 + pl.col("_copy").cast(pl.Int64)) * 2**32 + minute
    return pl.concat([rows, later]).sort(key, maintain_order=True)


def _number_text(expr: pl.Expr, decimals: int, decimal_mark: str) -> pl.Expr:
    """A number printed with fixed decimals (NULL stays NULL, printed as an empty cell)."""
    if decimals == 0:
        text = expr.round(0).cast(pl.Int64).cast(pl.String)
    else:
        text = expr.round(decimals).cast(pl.Decimal(18, decimals)).cast(pl.String)
    return text.str.replace(".", ",", literal=True) if decimal_mark == "," else text


def _csv_cells(truth: pl.DataFrame, profile: Profile, path: Path) -> list[pl.Expr]:
    """Expressions giving every cell as the export's text, named with the export's own column names."""
    codes = export_codes(path)
    yes, no = BOOLEAN_TEXT.get(profile.name, ("1", "0"))
    texts = truth.filter(pl.col("fault_type") == "text_result").select("sample_id", "field", "cell_text")
    cells: list[pl.Expr] = []
    for name, header in profile.columns.items():
        spec = FIELDS_BY_NAME[name]
        col = pl.col(name)
        if spec.kind is Kind.NUMBER:
            unit = profile.unit_of(name) if spec.unit_family else ""
            decimals = DECIMALS[name].get(unit, 1)
            cell = _number_text(col, decimals, profile.decimal_mark)
        elif spec.kind is Kind.TIMESTAMP:
            cell = (
                col.dt.replace_time_zone("UTC")
                .dt.convert_time_zone(profile.timezone)
                .dt.strftime(profile.datetime_format)
            )
        elif spec.kind is Kind.DATE:
            cell = col.dt.strftime(profile.date_format)
        elif spec.kind is Kind.BOOLEAN:
            cell = pl.when(col).then(pl.lit(yes)).when(~col).then(pl.lit(no))
        elif spec.kind is Kind.CODE:
            cell = col.replace_strict(codes.get(name, {}), default=None, return_dtype=pl.String)
        else:
            cell = col.cast(pl.String)
        field_texts = texts.filter(pl.col("field") == name)
        if field_texts.height:
            lookup = dict(zip(field_texts["sample_id"], field_texts["cell_text"], strict=True))
            cell = pl.coalesce(pl.col("sample_id").replace_strict(lookup, default=None, return_dtype=pl.String), cell)
        cells.append(cell.alias(header))
    return cells


def _write_csv(frame: pl.DataFrame, out: BinaryIO, profile: Profile, header: bool) -> None:
    """Append CSV in the profile's dialect; polars writes UTF-8, re-encoded when the profile wants another."""
    options = {"separator": profile.delimiter, "quote_char": profile.quote_char, "null_value": ""}
    if profile.encoding == "utf-8":
        frame.write_csv(out, include_header=header, **options)
        return
    buffer = io.BytesIO()
    frame.write_csv(buffer, include_header=header, **options)
    out.write(buffer.getvalue().decode("utf-8").encode(profile.encoding))


def _batches(rows: pl.DataFrame, single_file: bool) -> list[tuple[str, pl.DataFrame]]:
    """(file stem, rows) in writing order: one batch per export day, or slices of one file."""
    if single_file:
        return [("export_all", rows.slice(start, BATCH_ROWS)) for start in range(0, max(rows.height, 1), BATCH_ROWS)]
    return [
        (f"export_{day.isoformat()}", part)
        for (day,), part in sorted(rows.partition_by("_export_date", as_dict=True).items())
        if isinstance(day, date)
    ]


def _write_source(
    rows: pl.DataFrame,
    truth: pl.DataFrame,
    source: str,
    out_dir: Path,
    single_file: bool,
    profiles_dir: Path,
) -> list[Path]:
    path = profile_path(source, profiles_dir)
    profile = load_profile(path)
    # re-sent copies and first-sent values are canonical, so they are laid out before the unit conversion
    rows = _to_profile_units(_export_rows(rows, truth, profile.timezone), profile)
    folder = out_dir / source
    folder.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    if profile.format == "parquet":
        frame = rows.select(*(pl.col(c).alias(h) for c, h in profile.columns.items()), "_export_date")
        for stem, part in [("export_all", frame)] if single_file else _batches(frame, single_file=False):
            target = folder / f"{stem}.parquet"
            part.drop("_export_date").write_parquet(target)
            written.append(target)
        return written
    cells = _csv_cells(truth, profile, path)
    for stem, part in _batches(rows, single_file):
        # text is made one batch at a time, so a large single file never sits in memory as text
        target = folder / f"{stem}.csv"
        first = target not in written
        with target.open("wb" if first else "ab") as out:
            _write_csv(part.select(cells), out, profile, header=first)
        if first:
            written.append(target)
    return written


PRESCRIPTIONS_PROFILE = "demo_prescriptions.toml"
PRESCRIPTION_DECIMALS: dict[str, dict[str, int]] = {
    "target_spo2_low_pct": DECIMALS["target_spo2_low_pct"],
    "target_spo2_high_pct": DECIMALS["target_spo2_high_pct"],
    "o2_flow_l_min": {"L/min": 0},
    "fio2": {"fraction": 2, "percent": 0},
}
END_BEFORE_START_WRITTEN = pl.duration(hours=6)
"""How far before its start an order with the export fault ``end_before_start`` is written to end."""


def _prescription_rows(prescriptions: pl.DataFrame, timezone: str) -> pl.DataFrame:
    """Rows as the weekly extract sends them: each in the file of the week (Monday, local time) it started;
    an amended order first without its end time, then again, with it, in the file of the week it ended (at
    least the week after); the export faults written as the truth says."""
    local_monday = (
        pl.col("start_at").dt.replace_time_zone("UTC").dt.convert_time_zone(timezone).dt.date().dt.truncate("1w")
    )
    rows = prescriptions.with_columns(
        local_monday.alias("_week"),
        pl.when(pl.col("export_fault") == "target_range_invalid")
        .then(pl.col("target_spo2_high_pct"))
        .otherwise(pl.col("target_spo2_low_pct"))
        .alias("target_spo2_low_pct"),
        pl.when(pl.col("export_fault") == "target_range_invalid")
        .then(pl.col("target_spo2_low_pct"))
        .otherwise(pl.col("target_spo2_high_pct"))
        .alias("target_spo2_high_pct"),
        pl.when(pl.col("export_fault") == "end_before_start")
        .then(pl.col("start_at") - END_BEFORE_START_WRITTEN)
        .when(pl.col("amended"))
        .then(None)
        .otherwise(pl.col("end_at"))
        .alias("end_at"),
    )
    end_monday = pl.col("end_at").dt.replace_time_zone("UTC").dt.convert_time_zone(timezone).dt.date().dt.truncate("1w")
    amended = prescriptions.filter(pl.col("amended")).with_columns(
        pl.max_horizontal(end_monday, local_monday + pl.duration(weeks=1)).alias("_week")
    )
    return pl.concat([rows, amended.select(rows.columns)]).sort(
        "_week", "start_at", "prescription_id", maintain_order=True
    )


def write_prescriptions(prescriptions: pl.DataFrame, out_dir: Path, profiles_dir: Path = PROFILES_DIR) -> list[Path]:
    """The oxygen prescriptions feed as weekly CSV extracts in ``OUT/prescriptions/`` (profile
    ``demo_prescriptions.toml``): values in the profile's units, times in its zone and format, devices in
    its codes."""
    path = profiles_dir / PRESCRIPTIONS_PROFILE
    profile = load_profile(path)
    rows = _prescription_rows(prescriptions, profile.timezone)
    rows = rows.with_columns(
        to_unit(pl.col(name), name, profile.unit_of(name)).alias(name)
        for name in PRESCRIPTION_DECIMALS
        if name in profile.columns
    )
    codes = export_codes(path)
    cells: list[pl.Expr] = []
    for name, header in profile.columns.items():
        col = pl.col(name)
        if name in PRESCRIPTION_DECIMALS:
            cell = _number_text(col, PRESCRIPTION_DECIMALS[name][profile.unit_of(name)], profile.decimal_mark)
        elif name in ("start_at", "end_at"):
            cell = (
                col.dt.replace_time_zone("UTC")
                .dt.convert_time_zone(profile.timezone)
                .dt.strftime(profile.datetime_format)
            )
        elif name == "o2_device":
            cell = col.replace_strict(codes.get(name, {}), default=None, return_dtype=pl.String)
        else:
            cell = col.cast(pl.String)
        cells.append(cell.alias(header))
    folder = out_dir / "prescriptions"
    folder.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    for (week,), part in sorted(rows.partition_by("_week", as_dict=True).items()):
        target = folder / f"prescriptions_{week.isoformat()}.csv"
        with target.open("wb") as out:
            _write_csv(part.select(cells), out, profile, header=True)
        written.append(target)
    return written


README = """Demo blood gas exports - invented data
=====================================

Everything in this folder is invented by the demo-data generator (python -m synthetic_data).
{site} does not exist; its units, analysers, patients, identifiers, dates and results
are made up. Nothing comes from a real patient or a real record.

Generated: {generated}.

us_style/     main laboratory, US-style CSV (profiles/demo_us_style.toml)
eu_style/     critical-care point-of-care analysers, European-style CSV (profiles/demo_eu_style.toml)
parquet/      ward satellite analysers, data-warehouse Parquet (profiles/demo_parquet.toml)
ground_truth.parquet / .csv
              one row per sample with an injected fault: sample_id, fault_type, detail,
              physically_visible (whether physics can see it in the record), field,
              value_before / value_after (canonical units), cell_text, resend_delay_days.
lookalikes.parquet / .csv
              one row per sample of a clinical look-alike - a real (invented) patient whose
              physiology looks odd but is not an error, and which carries no fault:
              sample_id, lookalike_kind, detail. Records in neither file are clean.
prescriptions/prescriptions_YYYY-MM-DD.csv
              the oxygen prescriptions feed, one file per week of order start
              (profiles/demo_prescriptions.toml); an amended order is sent again in a later week.
prescriptions_truth.parquet / .csv
              every prescription with its final values (UTC) and what the generator did:
              encounter_kind (single, changed_target, ends_before_later_sample),
              order_in_encounter, export_fault (target_range_invalid, end_before_start: the
              loader should quarantine these rows), amended.
oxygen_truth.parquet
              per sample: the prescription in force by the generator's own link, the target the
              staff titrated oxygen to, where they aimed, and the true arterial saturation.

Files are named by the local date on which results were produced. A duplicate or a corrected
re-send appears again in a later file. Times in the CSV files are local wall-clock times, as
real exports have them: in the hour the clocks go back, a local time can stand for two moments.
"""


def write_exports(
    canonical: pl.DataFrame,
    ground_truth: pl.DataFrame,
    out_dir: Path | str,
    *,
    single_file: bool = False,
    profiles_dir: Path = PROFILES_DIR,
    provenance: dict[str, object] | None = None,
    lookalikes: pl.DataFrame | None = None,
    prescriptions: pl.DataFrame | None = None,
    oxygen: pl.DataFrame | None = None,
    feeds: bool = False,
) -> dict[str, list[Path]]:
    """Write every source's export files, the ground truth of faults, the look-alikes and a README;
    return the files per source. ``lookalikes`` None writes an empty look-alike file; ``prescriptions``
    (``prescribing.PRESCRIPTION_SCHEMA``) adds the prescriptions feed (key ``prescriptions``) and its
    truth, ``oxygen`` the per-sample oxygen truth. ``feeds`` writes two analysers' samples as a FHIR
    and an HL7 v2 feed (keys ``fhir`` and ``hl7v2``, ``feed_writers.py``) instead of their source's export."""
    from synthetic_data.feed_writers import split_feed_rows, write_feed  # it builds on this module

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    with_source = canonical.with_columns(source_of(pl.col("sample_id")).alias("_source"))
    written: dict[str, list[Path]] = {}
    for source in SOURCES:
        rows = with_source.filter(pl.col("_source") == source).drop("_source")
        if feeds:
            rows, feed_rows = split_feed_rows(rows)
            for feed, part in feed_rows.items():
                feed_truth = ground_truth.join(part.select("sample_id"), on="sample_id", how="semi")
                written[feed] = write_feed(feed, part, feed_truth, out_dir, single_file, profiles_dir)
        ids = rows.select("sample_id")
        truth = ground_truth.join(ids, on="sample_id", how="semi")
        written[source] = _write_source(rows, truth, source, out_dir, single_file, profiles_dir)
    ground_truth.write_parquet(out_dir / "ground_truth.parquet")
    ground_truth.write_csv(out_dir / "ground_truth.csv")
    lookalikes = pl.DataFrame(schema=LOOKALIKE_SCHEMA) if lookalikes is None else lookalikes
    lookalikes.write_parquet(out_dir / "lookalikes.parquet")
    lookalikes.write_csv(out_dir / "lookalikes.csv")
    info: dict[str, object] = {
        "records": canonical.height,
        "with a fault": ground_truth.height,
        "look-alikes": lookalikes.height,
    }
    if prescriptions is not None:
        written["prescriptions"] = write_prescriptions(prescriptions, out_dir, profiles_dir)
        prescriptions.write_parquet(out_dir / "prescriptions_truth.parquet")
        prescriptions.write_csv(out_dir / "prescriptions_truth.csv")
        info["prescriptions"] = prescriptions.height
    if oxygen is not None:
        oxygen.write_parquet(out_dir / "oxygen_truth.parquet")
    info.update(provenance or {})
    generated = ", ".join(f"{key} {value}" for key, value in info.items())
    (out_dir / "README.txt").write_text(README.format(site=SITE_NAME, generated=generated), encoding="utf-8")
    return written
