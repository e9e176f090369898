"""Oxygen prescriptions of the invented hospital: the feed the prescribing audit reads, with its gaps.

Every admission (encounter) in which the patient was sampled on supplemental oxygen may hold one or
two oxygen prescriptions with an SpO2 target range. The gaps a prescribing audit looks for are drawn
at the invented rates below, each recorded in the truth columns of the prescription table:

- **oxygen without any prescription**: the whole admission on oxygen with no order
  (``NO_PRESCRIPTION_SHARE``, by unit type: wards most often, critical care least);
- **no target range** on the (first) order (``NO_TARGET_SHARE``);
- **ended before a later sample**: the order stops between two samples while oxygen goes on
  (``ENDS_EARLY_SHARE`` of admissions with at least two samples);
- **changed target**: a second order with another target starts between two samples while the first
  is still running (it ends some hours later or is never ended: overlapping orders;
  ``CHANGED_TARGET_SHARE``). The first order's target is corrected to the patient's standard one or,
  where it already was the standard, individualised to 92-96 %;
- **open-ended**: no end time, still active at export (``OPEN_ENDED_SHARE`` of last orders);
- **target against the documented risk**: patients documented at risk of hypercapnic failure are mostly
  prescribed 88-92 % but some 94-98 % (``RISK_PRESCRIBED_HIGH_SHARE``), and a few without documented
  risk are prescribed 88-92 % (``LOW_TARGET_WITHOUT_RISK_SHARE``);
- **export faults** the loader must quarantine: the target's ends swapped (``TARGET_RANGE_INVALID``) or
  an end time before the start (``END_BEFORE_START``); and orders first sent open and sent again, amended
  with their end time, in a later file (``AMENDED_SHARE``).

Children (the paediatric unit) and neonates are prescribed their units' local targets (invented:
92-98 % and 91-95 %). The generator links each sample to its prescription with its own rule (same
encounter, started at or before the sample and not yet ended; the latest start wins) - not the
pipeline's SQL. The link decides the target the bedside staff titrate oxygen to (``titration.py``).
"""

from __future__ import annotations

import numpy as np
import polars as pl

from synthetic_data import devices as dev
from synthetic_data.hospital import UNIT_TYPES

STANDARD_TARGET = (94.0, 98.0)
"""The usual adult target range (BTS 2017, O'Driscoll BR et al., Thorax 72 Suppl 1; from memory)."""
HYPERCAPNIC_TARGET = (88.0, 92.0)
"""The target range for patients at risk of hypercapnic respiratory failure (BTS 2017; from memory)."""
INDIVIDUAL_TARGET = (92.0, 96.0)
"""An individualised range some critical-care teams prescribe (invented for the demo)."""
LOCAL_TARGETS: dict[str, tuple[float, float]] = {"paediatric": (92.0, 98.0), "neonatal": (91.0, 95.0)}
"""Local policy of the invented hospital for children and neonates (invented)."""

NO_PRESCRIPTION_SHARE: dict[str, float] = {
    "critical_care": 0.04,
    "emergency": 0.14,
    "ward": 0.16,
    "paediatric": 0.08,
    "neonatal": 0.03,
}
"""Share of admissions on oxygen with no oxygen prescription at all, by unit type (invented)."""
NO_TARGET_SHARE = 0.10
"""Share of first prescriptions of an admission without a target range (invented)."""
ENDS_EARLY_SHARE = 0.10
"""Share of prescribed admissions (two or more samples) whose order ends before a later sample (invented)."""
CHANGED_TARGET_SHARE = 0.14
"""Share of prescribed admissions (two or more samples) whose target is changed by a second order (invented)."""
FIRST_LEFT_OPEN_SHARE = 0.4
"""Share of changed targets whose first order is never ended; the rest end it 1-24 h later (invented)."""
OPEN_ENDED_SHARE = 0.30
"""Share of last orders without an end time (invented)."""
RISK_PRESCRIBED_HIGH_SHARE = 0.12
"""Share of patients documented at hypercapnic risk prescribed 94-98 % instead of 88-92 % (invented)."""
LOW_TARGET_WITHOUT_RISK_SHARE = 0.05
"""Share of patients without documented hypercapnic risk prescribed 88-92 % (invented)."""
INDIVIDUAL_TARGET_SHARE = 0.20
"""Share of critical-care patients without hypercapnic risk prescribed 92-96 % (invented)."""
TARGET_RANGE_INVALID_SHARE = 0.006
"""Share of prescriptions exported with the two ends of the target swapped (invented)."""
END_BEFORE_START_SHARE = 0.006
"""Share of prescriptions exported with an end time before the start (invented)."""
AMENDED_SHARE = 0.03
"""Share of ended prescriptions first sent open and sent again with their end time (invented)."""
PRESCRIBER_ROLES: dict[str, float] = {"doctor": 0.85, "nurse_practitioner": 0.10, "physiotherapist": 0.05}
"""Who prescribes the oxygen (invented mix)."""

ENCOUNTER_KINDS = ("not_on_oxygen", "no_prescription", "single", "ends_before_later_sample", "changed_target")

PRESCRIPTION_SCHEMA: dict[str, pl.DataType] = {
    "prescription_id": pl.String(),
    "patient_id": pl.String(),
    "encounter_id": pl.String(),
    "unit": pl.String(),
    "start_at": pl.Datetime("us"),
    "end_at": pl.Datetime("us"),
    "target_spo2_low_pct": pl.Float64(),
    "target_spo2_high_pct": pl.Float64(),
    "o2_device": pl.String(),
    "o2_flow_l_min": pl.Float64(),
    "fio2": pl.Float64(),
    "prescriber_role": pl.String(),
    # truth: what the generator did (the pipeline never sees these columns)
    "encounter_kind": pl.String(),
    "order_in_encounter": pl.Int64(),
    "hypercapnic_risk": pl.Boolean(),
    "export_fault": pl.String(),
    "amended": pl.Boolean(),
}
"""Canonical prescription fields (final values, UTC, as the loader should store them) and truth columns."""


def _minutes(expr: pl.Expr) -> pl.Expr:
    return expr.dt.epoch("s") // 60


def _standard(risk: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    low = np.where(risk, HYPERCAPNIC_TARGET[0], STANDARD_TARGET[0])
    high = np.where(risk, HYPERCAPNIC_TARGET[1], STANDARD_TARGET[1])
    return low, high


def draw_prescriptions(rng: np.random.Generator, samples: pl.DataFrame) -> pl.DataFrame:
    """The oxygen prescriptions of the sampled admissions (``PRESCRIPTION_SCHEMA``; device, flow and FiO2
    still empty: ``complete_prescriptions`` takes them from the first sample after titration).

    ``samples`` needs ``encounter_id``, ``patient_id``, ``unit``, ``collected_at``, ``true_device``,
    ``hypercapnic_risk``.
    """
    ordered = samples.select(
        "encounter_id",
        "patient_id",
        "unit",
        _minutes(pl.col("collected_at")).alias("t"),
        (pl.col("true_device") != "room_air").alias("oxygen"),
        "hypercapnic_risk",
    ).sort("encounter_id", "t")
    enc = (
        ordered.group_by("encounter_id", maintain_order=True)
        .agg(
            pl.col("patient_id").first(),
            pl.col("unit").first(),
            pl.col("t").min().alias("first_t"),
            pl.col("t").max().alias("last_t"),
            pl.len().alias("n"),
            pl.col("oxygen").any(),
            pl.col("hypercapnic_risk").first().alias("risk"),
        )
        .with_columns(pl.col("unit").replace_strict(UNIT_TYPES, default="ward").alias("unit_type"))
    )
    e = enc.height
    unit_type = enc["unit_type"].to_numpy()
    risk = enc["risk"].to_numpy().astype(bool)
    n = enc["n"].to_numpy()
    no_rx_share = np.array([NO_PRESCRIPTION_SHARE.get(str(t), NO_PRESCRIPTION_SHARE["ward"]) for t in unit_type])
    prescribed = enc["oxygen"].to_numpy() & (rng.random(e) >= no_rx_share)
    u_pattern = rng.random(e)
    several = prescribed & (n >= 2)
    changed = several & (u_pattern < CHANGED_TARGET_SHARE)
    ends_early = several & ~changed & (u_pattern < CHANGED_TARGET_SHARE + ENDS_EARLY_SHARE)

    # the sample gap in which the order ends or changes: between the k-th and (k+1)-th sample
    k = np.floor(rng.random(e) * np.maximum(n - 1, 1)).astype(np.int64) + 1
    ranked = ordered.with_columns(pl.int_range(pl.len()).over("encounter_id").alias("rank"))
    pick = enc.select("encounter_id", pl.Series("k", k))
    before = pick.join(ranked, left_on=["encounter_id", pl.col("k") - 1], right_on=["encounter_id", "rank"], how="left")
    after = pick.join(ranked, left_on=["encounter_id", "k"], right_on=["encounter_id", "rank"], how="left")
    t_before = before["t"].fill_null(0).to_numpy()
    t_after = after["t"].fill_null(0).to_numpy()
    gap = t_after - t_before
    # a change or an end needs a whole minute between the two samples
    changed &= gap >= 1
    ends_early &= gap >= 1
    cut = t_before + 1 + np.floor(rng.random(e) * np.maximum(gap - 1, 0)).astype(np.int64)

    # targets: the unit's local policy for children and neonates, else by the documented risk
    std_low, std_high = _standard(risk)
    u_target = rng.random(e)
    low, high = std_low.copy(), std_high.copy()
    high_for_risk = risk & (u_target < RISK_PRESCRIBED_HIGH_SHARE)
    low[high_for_risk], high[high_for_risk] = STANDARD_TARGET
    low_without_risk = ~risk & (u_target < LOW_TARGET_WITHOUT_RISK_SHARE)
    low[low_without_risk], high[low_without_risk] = HYPERCAPNIC_TARGET
    individual = (
        ~risk
        & (unit_type == "critical_care")
        & (u_target >= LOW_TARGET_WITHOUT_RISK_SHARE)
        & (u_target < LOW_TARGET_WITHOUT_RISK_SHARE + INDIVIDUAL_TARGET_SHARE)
    )
    low[individual], high[individual] = INDIVIDUAL_TARGET
    for kind, (lo, hi) in LOCAL_TARGETS.items():
        m = unit_type == kind
        low[m], high[m] = lo, hi
    # the second order of a changed target: corrected to the standard, or individualised
    is_standard = (low == std_low) & (high == std_high)
    low2 = np.where(is_standard, INDIVIDUAL_TARGET[0], std_low)
    high2 = np.where(is_standard, INDIVIDUAL_TARGET[1], std_high)
    # a first order may lack a target; a second order is written to set one
    no_target = rng.random(e) < NO_TARGET_SHARE
    low = np.where(no_target, np.nan, low)
    high = np.where(no_target, np.nan, high)

    # times (whole minutes): written before the first sample (a few minutes to half a day), ended some
    # hours after the last sample unless left open
    start1 = enc["first_t"].to_numpy() - np.round(rng.uniform(5, 720, e)).astype(np.int64)
    after_last = enc["last_t"].to_numpy() + np.round(rng.uniform(60, 2880, e)).astype(np.int64)
    last_open = rng.random(e) < OPEN_ENDED_SHARE
    last_end = np.where(last_open, -1, after_last)
    overlap_end = cut + np.round(rng.uniform(60, 1440, e)).astype(np.int64)
    first_open = rng.random(e) < FIRST_LEFT_OPEN_SHARE
    end1 = np.where(changed, np.where(first_open, -1, overlap_end), np.where(ends_early, cut, last_end))
    kind = np.where(changed, "changed_target", np.where(ends_early, "ends_before_later_sample", "single"))

    def orders(mask: np.ndarray, order: int, start: np.ndarray, end: np.ndarray, lo: np.ndarray, hi: np.ndarray):
        return pl.DataFrame(
            {
                "encounter_id": enc["encounter_id"].filter(pl.Series(mask)),
                "patient_id": enc["patient_id"].filter(pl.Series(mask)),
                "unit": enc["unit"].filter(pl.Series(mask)),
                "start_t": start[mask],
                "end_t": end[mask],
                "target_spo2_low_pct": lo[mask],
                "target_spo2_high_pct": hi[mask],
                "encounter_kind": kind[mask],
                "order_in_encounter": np.full(int(mask.sum()), order, dtype=np.int64),
                "hypercapnic_risk": risk[mask],
            }
        )

    out = pl.concat(
        [orders(prescribed, 1, start1, end1, low, high), orders(changed, 2, cut, last_end, low2, high2)]
    ).with_columns(pl.col("target_spo2_low_pct", "target_spo2_high_pct").fill_nan(None))
    m = out.height
    roles = np.array(list(PRESCRIBER_ROLES), dtype=object)
    role = roles[rng.choice(roles.size, m, p=np.array(list(PRESCRIBER_ROLES.values())))]
    u_fault = rng.random(m)
    has_target = out["target_spo2_low_pct"].is_not_null().to_numpy()
    has_end = (out["end_t"] >= 0).to_numpy()
    fault = np.full(m, None, dtype=object)
    fault[has_target & (u_fault < TARGET_RANGE_INVALID_SHARE)] = "target_range_invalid"
    end_fault = (u_fault >= TARGET_RANGE_INVALID_SHARE) & (
        u_fault < TARGET_RANGE_INVALID_SHARE + END_BEFORE_START_SHARE
    )
    fault[end_fault] = "end_before_start"
    amended = has_end & (fault == None) & (rng.random(m) < AMENDED_SHARE)  # noqa: E711 (object array)
    epoch = pl.datetime(1970, 1, 1)
    # order numbers of the prescribing system grow with the time the order was written
    number = pl.col("start_t").rank("ordinal").cast(pl.Int64) + 4_100_000
    return (
        out.with_columns(
            pl.Series("prescriber_role", role.tolist(), dtype=pl.String),
            pl.Series("export_fault", fault.tolist(), dtype=pl.String),
            pl.Series("amended", amended),
            (epoch + pl.duration(minutes=pl.col("start_t"))).alias("start_at"),
            pl.when(pl.col("end_t") >= 0).then(epoch + pl.duration(minutes=pl.col("end_t"))).alias("end_at"),
            pl.format("OX{}", number.cast(pl.String).str.zfill(8)).alias("prescription_id"),
            pl.lit(None, dtype=pl.String).alias("o2_device"),
            pl.lit(None, dtype=pl.Float64).alias("o2_flow_l_min"),
            pl.lit(None, dtype=pl.Float64).alias("fio2"),
        )
        .select(list(PRESCRIPTION_SCHEMA))
        .cast(PRESCRIPTION_SCHEMA)
        .sort("start_at", "prescription_id")
    )


def link_samples(samples: pl.DataFrame, prescriptions: pl.DataFrame) -> pl.DataFrame:
    """Per sample (``_row``): the prescription in force at collection, by the generator's own rule.

    In force: same encounter, ``start_at <= collected_at`` and (no end or ``collected_at < end_at``); of
    several, the one started last. Export faults do not change what was prescribed. Returns ``_row``,
    ``prescription_id``, ``rx_low``, ``rx_high`` (NULL where none is in force).
    """
    live = samples.select("_row", "encounter_id", "collected_at").join(
        prescriptions.select(
            "encounter_id",
            "prescription_id",
            "start_at",
            "end_at",
            pl.col("target_spo2_low_pct").alias("rx_low"),
            pl.col("target_spo2_high_pct").alias("rx_high"),
        ),
        on="encounter_id",
        how="inner",
    )
    live = live.filter(
        (pl.col("start_at") <= pl.col("collected_at"))
        & (pl.col("end_at").is_null() | (pl.col("collected_at") < pl.col("end_at")))
    )
    chosen = live.sort("_row", "start_at", "prescription_id", descending=[False, True, True]).unique(
        "_row", keep="first", maintain_order=True
    )
    return samples.select("_row").join(
        chosen.select("_row", "prescription_id", "rx_low", "rx_high"), on="_row", how="left", maintain_order="left"
    )


def complete_prescriptions(prescriptions: pl.DataFrame, state: pl.DataFrame) -> pl.DataFrame:
    """Prescribed device, flow and FiO2: those of the first sample the order covers, after titration
    (room air is not prescribed: those orders name no device). Low-flow devices carry their flow,
    set-FiO2 devices their FiO2."""
    first = (
        state.filter(pl.col("prescription_id").is_not_null() & (pl.col("true_device") != "room_air"))
        .sort("collected_at")
        .unique("prescription_id", keep="first", maintain_order=True)
        .select(
            "prescription_id",
            pl.col("true_device").alias("_device"),
            pl.when(pl.col("true_device").is_in(dev.LOW_FLOW_DEVICES)).then(pl.col("flow")).alias("_flow"),
            pl.when(pl.col("true_device").is_in(dev.SET_FIO2_DEVICES)).then(pl.col("fio2_set")).alias("_fio2"),
        )
    )
    return (
        prescriptions.join(first, on="prescription_id", how="left", maintain_order="left")
        .with_columns(
            pl.col("_device").alias("o2_device"), pl.col("_flow").alias("o2_flow_l_min"), pl.col("_fio2").alias("fio2")
        )
        .select(list(PRESCRIPTION_SCHEMA))
    )
