"""Oxygen titrated to a target: how the bedside staff set the oxygen before each sample.

Staff titrate oxygen by the pulse oximeter towards the SpO2 target in force: the prescribed range
(``prescribing.py``), or where none is prescribed (or the order has no range) the range they use by
habit - 88-92 % for a patient documented at risk of hypercapnic failure, 94-98 % otherwise. They do
not always reach it. For each sample on oxygen the generator draws an aim (invented mixes,
``AIM_MIX``): within the range, above it (oxygen left up) or below it (weaned too far, or not escalated
in time), and an SpO2 reading for that aim. The saturation behind that reading follows from the
patient's own oximeter error (the pigmented fifth over-read at low saturations, ``hospital.py``) and
carboxy- and methaemoglobin, plus a drift between the titration and the sample (SD
``DRIFT_SD_POINTS``). The inspired oxygen giving that saturation is found by running the forward model
backwards with the patient's own lungs (``required_fio2``), and the device is set to it in the steps
the device allows: whole litres on a nasal cannula (1-6 L/min), a simple mask (5-10 L/min) or a
reservoir mask (10-15 L/min) chosen by the FiO2 needed, the nearest labelled Venturi setting, set FiO2
on high-flow, CPAP, NIV and ventilators within their limits. A patient needing less than
``WEAN_FIO2`` on a low-flow device is often taken off oxygen (``WEAN_SHARE``). Where the device cannot
reach the FiO2 needed the patient stays below the target - as on real wards. The saturation the
sample then shows comes from the forward model as for any other sample, so steps, breathing and drift
spread it around the aim.

Look-alike patients keep their own oxygenation (no titration), except those whose point is Hb or sodium
(``TITRATED_LOOKALIKES``).
"""

from __future__ import annotations

import numpy as np
import polars as pl

from synthetic_data import devices as dev
from synthetic_data import physics as phys
from synthetic_data.hospital import UNIT_TYPES
from synthetic_data.lookalikes import LOOKALIKE_KINDS
from synthetic_data.prescribing import HYPERCAPNIC_TARGET, STANDARD_TARGET

AIM_POSITIONS = ("below", "within", "above")
AIM_MIX: dict[tuple[str, str], tuple[float, float, float]] = {
    # (unit type, basis) -> shares aimed below, within, above the range (invented)
    ("critical_care", "prescribed"): (0.04, 0.78, 0.18),
    ("emergency", "prescribed"): (0.05, 0.60, 0.35),
    ("ward", "prescribed"): (0.05, 0.66, 0.29),
    ("critical_care", "habit"): (0.04, 0.64, 0.32),
    ("emergency", "habit"): (0.04, 0.46, 0.50),
    ("ward", "habit"): (0.04, 0.50, 0.46),
}
"""Where the staff leave the saturation, by unit type and whether a target was prescribed (invented).
Unprescribed oxygen is left high more often."""
DRIFT_SD_POINTS = 0.8
"""Saturation drift between the last titration and the sample, SD in points (invented)."""
WEAN_FIO2 = 0.215
WEAN_SHARE = 0.6
"""Share of patients on a low-flow device or Venturi mask whose aim room air reaches (they need less than
``WEAN_FIO2``) who are taken off oxygen (invented)."""

TITRATED_LOOKALIKES = ("transfusion", "sodium_correction")
"""Look-alikes whose oxygenation is ordinary (their point is Hb or sodium): titrated like everyone else."""

SET_FIO2_LIMITS: dict[str, tuple[float, float, float]] = {
    # device -> lowest, highest FiO2 and the step it is set in (common practice)
    "high_flow_nasal": (0.21, 1.0, 0.01),
    "cpap": (0.21, 1.0, 0.05),
    "niv": (0.21, 0.8, 0.05),
    "invasive_ventilation": (0.21, 1.0, 0.01),
}
TRACHEOSTOMY_SETTINGS = (0.24, 0.28, 0.35, 0.40, 0.50, 0.60)
DEVICE_CEILING: dict[str, float] = {
    # the highest FiO2 a device gives (devices.py: a reservoir mask at 15 L/min about 0.73; the rest
    # their highest setting); set-FiO2 devices up to their SET_FIO2_LIMITS
    "nasal_cannula": 0.72,  # the low-flow ladder moves the patient on to a mask first
    "simple_mask": 0.72,
    "reservoir_mask": 0.72,
    "venturi_mask": 0.60,
    "tracheostomy_mask": 0.60,
    "cpap": 1.0,
    "niv": 0.8,
}


def draw_aims(rng: np.random.Generator, frame: pl.DataFrame) -> pl.DataFrame:
    """Add the titration target (``titrate_low``, ``titrate_high``, ``titrate_basis``), the aim
    (``aim_position``, ``aim_spo2``) and ``u_wean``; NULL aims where nothing is titrated (room air,
    look-alikes). ``frame`` needs ``rx_low``, ``rx_high``, ``hypercapnic_risk``, ``unit``,
    ``true_device``, ``lookalike_idx``."""
    n = frame.height
    risk = frame["hypercapnic_risk"].to_numpy().astype(bool)
    rx_low = frame["rx_low"].cast(pl.Float64).fill_null(np.nan).to_numpy()
    rx_high = frame["rx_high"].cast(pl.Float64).fill_null(np.nan).to_numpy()
    prescribed = ~np.isnan(rx_low)
    low = np.where(prescribed, rx_low, np.where(risk, HYPERCAPNIC_TARGET[0], STANDARD_TARGET[0]))
    high = np.where(prescribed, rx_high, np.where(risk, HYPERCAPNIC_TARGET[1], STANDARD_TARGET[1]))
    unit_type = frame["unit"].replace_strict(UNIT_TYPES, default="ward").to_numpy()
    ordinary_oxygen = frame["lookalike_idx"].is_in([-1, *(LOOKALIKE_KINDS.index(k) for k in TITRATED_LOOKALIKES)])
    titrated = ordinary_oxygen.to_numpy() & (frame["true_device"] != "room_air").to_numpy()
    u = rng.random(n)
    position = np.full(n, 1, dtype=np.int64)
    for (kind, basis), (below, within, _above) in AIM_MIX.items():
        m = (unit_type == kind) & (prescribed == (basis == "prescribed"))
        position[m] = np.where(u[m] < below, 0, np.where(u[m] < below + within, 1, 2))
    # within: staff aim a little above the middle of the range (the oximeter tends to read high, and a
    # reading at the low end worries): a triangular spread of 40 % of the range around 70 % of it
    middle = low + (high - low) * (0.7 + 0.2 * (rng.random(n) + rng.random(n) - 1.0))
    spo2 = np.where(
        position == 1,
        middle,
        np.where(
            position == 2, np.minimum(high + 1.0 + rng.exponential(1.5, n), 100.0), low - rng.uniform(1.0, 5.0, n)
        ),
    )
    return frame.with_columns(
        pl.Series("titrate_low", np.where(titrated, low, np.nan)).fill_nan(None),
        pl.Series("titrate_high", np.where(titrated, high, np.nan)).fill_nan(None),
        pl.Series("titrate_basis", np.where(prescribed, "prescribed", "habit"), dtype=pl.String),
        pl.Series(
            "aim_position",
            np.where(titrated, np.array(AIM_POSITIONS, dtype=object)[position], None).tolist(),
            pl.String,
        ),
        pl.Series("aim_spo2", np.where(titrated, spo2, np.nan)),
        pl.Series("u_drift", rng.normal(0.0, DRIFT_SD_POINTS, n)),
        pl.Series("u_wean", rng.random(n)),
    )


def aimed_saturation(
    aim_spo2: np.ndarray,
    oximeter_bias: np.ndarray,
    oximeter_extra: np.ndarray,
    cohb_pct: np.ndarray,
    methb_pct: np.ndarray,
    drift_points: np.ndarray,
) -> np.ndarray:
    """The functional saturation (fraction) behind the SpO2 reading aimed at, after the drift.

    Undoes the forward model's oximeter step: the patient's error (the extra over-reading weighted as at
    that saturation) and ``physics.functional_from_pulse_reading``.
    """
    reading = aim_spo2 - oximeter_bias
    # the over-reading of pigmented skin grows below 97 %: weigh it at the reading itself (close enough)
    reading = reading - oximeter_extra * np.clip((97.0 - reading) / 9.0, 0.0, 1.0)
    sat = phys.functional_from_pulse_reading(reading, cohb_pct, methb_pct) + drift_points / 100.0
    return np.clip(sat, 0.60, 0.995)


def required_fio2(
    sat: np.ndarray,
    p50: np.ndarray,
    hb_available: np.ndarray,
    t_c: np.ndarray,
    shunt: np.ndarray,
    av_diff: np.ndarray,
    gradient: np.ndarray,
    paco2: np.ndarray,
    pb: np.ndarray,
    ph2o: np.ndarray,
    rq: np.ndarray,
) -> np.ndarray:
    """The FiO2 at which the forward model's lungs give the functional saturation ``sat``.

    Backwards through step 4 of ``forward_model.py``: PaO2 of that saturation on the patient's curve,
    its content, the end-capillary content before the venous admixture (Cc' = Ca + D Qs / (1 - Qs)),
    its PO2, plus the V/Q gradient gives the alveolar PO2, and the alveolar gas equation
    (``physics.alveolar_po2_mmhg``) solved for FiO2: FiO2 = (PAO2 + PaCO2 / R) / (PB - PH2O - PaCO2 (1 - 1/R)).
    Above 1 where no FiO2 is enough; NaN where ``sat`` is NaN (not titrated).
    """
    pao2 = phys.hill_po2(sat, p50)
    ca = phys.o2_content(pao2, hb_available, p50, t_c)
    cc = ca + av_diff * shunt / (1.0 - shunt)
    pc = phys.po2_from_content(cc, hb_available, p50, t_c, iterations=12)
    alveolar = pc + gradient
    fio2 = (alveolar + paco2 / rq) / (pb - ph2o - paco2 * (1.0 - 1.0 / rq))
    return np.where(np.isnan(sat), np.nan, fio2)  # the content solver brackets NaN into a number


def _nearest(settings: tuple[float, ...], value: np.ndarray) -> np.ndarray:
    table = np.array(settings)
    return table[np.argmin(np.abs(table[None, :] - value[:, None]), axis=1)]


def set_devices(
    device: np.ndarray,
    flow: np.ndarray,
    fio2_set: np.ndarray,
    need: np.ndarray,
    u_breathing: np.ndarray,
    u_venturi: np.ndarray,
    u_wean: np.ndarray,
    aim_above: np.ndarray,
    high_flow_at_hand: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Device, flow and set FiO2 giving the FiO2 ``need`` as closely as each device's steps allow.

    ``need`` NaN: the sample is not titrated (returned unchanged). Low-flow devices solve the delivered
    FiO2 of ``devices.delivered_fio2`` for the flow at this breathing pattern (staff read the oximeter,
    so the breathing they see is the one the sample gets). Where the device cannot give the FiO2 needed,
    units with high-flow at hand (``high_flow_at_hand``: critical care, emergency) move the patient to
    high-flow nasal oxygen at 50 L/min; a Venturi mask on a ward gives way to a reservoir mask.
    """
    device, flow, fio2_set = device.copy(), flow.copy(), fio2_set.copy()
    active = ~np.isnan(need)
    names = np.array(dev.DEVICES, dtype=object)[device]
    ceiling = np.array([DEVICE_CEILING.get(d, 1.0) for d in dev.DEVICES])[device]
    escalate = active & (need > ceiling)
    to_high_flow = escalate & high_flow_at_hand
    names[to_high_flow] = "high_flow_nasal"
    device[to_high_flow] = dev.DEVICES.index("high_flow_nasal")
    flow[to_high_flow] = 50.0
    to_reservoir = escalate & ~high_flow_at_hand & (names == "venturi_mask")
    names[to_reservoir] = "reservoir_mask"
    low_flow = active & np.isin(names, ["nasal_cannula", "simple_mask", "reservoir_mask"])
    venturi = active & (names == "venturi_mask")
    trach = active & (names == "tracheostomy_mask")
    # taken off oxygen: needs (almost) none, and the aim was not to leave it high
    wean = (low_flow | venturi) & (need < WEAN_FIO2) & ~aim_above & (u_wean < WEAN_SHARE)
    low_flow &= ~wean
    venturi &= ~wean
    # the low-flow ladder: the cheapest device that reaches the FiO2 needed
    cannula = low_flow & (need <= 0.38)
    mask = low_flow & (need > 0.38) & (need <= 0.58)
    reservoir = low_flow & (need > 0.58)
    for m, index, (a, b, sd), (q_lo, q_hi) in (
        (cannula, dev.NASAL_CANNULA, (0.21, 0.035, 0.03), (1, 6)),
        (mask, dev.SIMPLE_MASK, (0.25, 0.035, 0.05), (5, 10)),
        (reservoir, dev.RESERVOIR_MASK, (0.35, 0.025, 0.06), (10, 15)),
    ):
        device[m] = index
        flow[m] = np.clip(np.round((need[m] - a - sd * u_breathing[m]) / b), q_lo, q_hi)
        fio2_set[m] = np.nan
    # Venturi and tracheostomy masks: the nearest labelled setting, at the flow printed for it (or the
    # same multiple of it as before)
    m = venturi | trach
    factor = np.nan_to_num(flow[m] / dev.venturi_flow(fio2_set[m]), nan=1.0)
    fio2_set[venturi] = _nearest(dev.VENTURI_SETTINGS, need[venturi] + 0.02 * u_venturi[venturi])
    fio2_set[trach] = _nearest(TRACHEOSTOMY_SETTINGS, need[trach])
    flow[m] = dev.venturi_flow(fio2_set[m]) * factor
    for name, (lo, hi, step) in SET_FIO2_LIMITS.items():
        m = active & (names == name)
        fio2_set[m] = np.clip(np.round(np.round(need[m] / step) * step, 2), lo, hi)
    device[wean] = dev.ROOM_AIR
    flow[wean] = 0.0
    fio2_set[wean] = np.nan
    return device, flow, np.round(fio2_set, 2)
