"""The generator's own oxygen-device table: what each device really delivers and what is charted.

Assumptions (the generator's, stated here; none is taken from the pipeline's device macros):

- **Room air**: FiO2 0.2095 (dry air), charted 0.21.
- **Nasal cannula**, flow Q 1-6 L/min: delivered FiO2 about 0.21 + 0.035 Q, varying with the
  breathing pattern (SD 0.03; mouth breathing and slow breathing raise it), kept within
  ``[0.22, min(0.24 + 0.05 Q, 0.50)]``. Measured pharyngeal FiO2 was 0.26-0.54 at 1-6 L/min with
  a wide spread (Wettstein RB, Shelledy DC, Peters JI 2005, Respir Care 50:604; from memory).
  Charted by the bedside rule of about 4 % per litre: 0.24 at 1 L/min ... 0.44 at 6 L/min
  (common practice).
- **Simple face mask**, 5-10 L/min: delivered 0.25 + 0.035 Q (0.43 at 5, 0.60 at 10 L/min), SD
  0.05, within ``[0.32, 0.62]``; charted 0.35 at 5-6, 0.40 at 7-8, 0.50 at 9-10 L/min. BTS 2017
  quotes about 40-60 % over 5-10 L/min (O'Driscoll BR et al., Thorax 72 Suppl 1; from memory).
- **Reservoir (non-rebreathing) mask**, 10-15 L/min: delivered 0.35 + 0.025 Q (0.60 at 10, 0.73 at
  15 L/min; air is entrained around the mask), SD 0.06, within ``[0.55, 0.90]``; charted
  0.60 + 0.04 (Q - 10), rounded to 0.05 (common practice: charts say 60-80 %).
- **Venturi valves**: the labelled setting, at the minimum flow printed for it or 1.5 times that;
  delivered the setting or up to 0.02 less (inspiratory flow above the entrained total).
  Printed minimum flows 24 % 2, 28 % 4, 31 % 6, 35 % 8, 40 % 10, 50 % 12, 60 % 15 L/min (values
  printed on common valves, from memory; 28 % at 4 L/min as in BTS 2017).
- **Set-FiO2 devices** (high-flow nasal, CPAP, NIV, invasive ventilation, tracheostomy mask on a
  humidified Venturi, the bypass circuit's oxygenator charted as ``other``): the set value is
  delivered and charted.

``charting_envelope`` gives the range a charted FiO2 can have for a documented device and flow
without contradicting this table (used by the fault ``fio2_device_mismatch`` and for visibility).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from synthetic_data.physics import AIR_O2_FRACTION

Array = npt.NDArray[np.float64]

LOW_FLOW_DEVICES = ("room_air", "nasal_cannula", "simple_mask", "reservoir_mask")
"""Devices whose FiO2 follows from the flow and the breathing; the others deliver a set FiO2."""
SET_FIO2_DEVICES = (
    "venturi_mask",
    "high_flow_nasal",
    "cpap",
    "niv",
    "invasive_ventilation",
    "tracheostomy_mask",
    "other",
)
DEVICES: tuple[str, ...] = LOW_FLOW_DEVICES + SET_FIO2_DEVICES
VENTURI_SETTINGS = (0.24, 0.28, 0.31, 0.35, 0.40, 0.50, 0.60)
VENTURI_MIN_FLOW = (2.0, 4.0, 6.0, 8.0, 10.0, 12.0, 15.0)

ROOM_AIR = DEVICES.index("room_air")
NASAL_CANNULA = DEVICES.index("nasal_cannula")
SIMPLE_MASK = DEVICES.index("simple_mask")
RESERVOIR_MASK = DEVICES.index("reservoir_mask")
VENTURI_MASK = DEVICES.index("venturi_mask")
TRACHEOSTOMY_MASK = DEVICES.index("tracheostomy_mask")

# (mean intercept, mean slope per L/min, SD, lower bound, upper bound) of the delivered FiO2
_LOW_FLOW_MODEL = {
    NASAL_CANNULA: (0.21, 0.035, 0.03),
    SIMPLE_MASK: (0.25, 0.035, 0.05),
    RESERVOIR_MASK: (0.35, 0.025, 0.06),
}


def venturi_flow(setting: Array) -> Array:
    """Minimum oxygen flow printed for a Venturi setting (NaN for anything that is not a setting)."""
    out = np.full(setting.shape, np.nan)
    for fio2, flow in zip(VENTURI_SETTINGS, VENTURI_MIN_FLOW, strict=True):
        out[np.isclose(setting, fio2, atol=1e-6)] = flow
    return out


def delivered_range(device: npt.NDArray[np.int64], flow: Array) -> tuple[Array, Array]:
    """Lowest and highest FiO2 a low-flow device can deliver at a flow (NaN for other devices)."""
    lo = np.full(device.shape, np.nan)
    hi = np.full(device.shape, np.nan)
    lo[device == ROOM_AIR] = AIR_O2_FRACTION
    hi[device == ROOM_AIR] = AIR_O2_FRACTION
    m = device == NASAL_CANNULA
    lo[m] = 0.22
    hi[m] = np.minimum(0.24 + 0.05 * flow[m], 0.50)
    m = device == SIMPLE_MASK
    lo[m], hi[m] = 0.32, 0.62
    m = device == RESERVOIR_MASK
    lo[m], hi[m] = 0.55, 0.90
    return lo, hi


def delivered_fio2(
    device: npt.NDArray[np.int64], flow: Array, set_fio2: Array, u_breathing: Array, u_venturi: Array
) -> Array:
    """The FiO2 the patient really breathes (see the module docstring).

    ``u_breathing`` is a standard normal draw (breathing pattern), ``u_venturi`` uniform 0-1.
    """
    out = set_fio2.astype(np.float64).copy()
    out[device == ROOM_AIR] = AIR_O2_FRACTION
    lo, hi = delivered_range(device, flow)
    for dev, (a, b, sd) in _LOW_FLOW_MODEL.items():
        m = device == dev
        out[m] = np.clip(a + b * flow[m] + sd * u_breathing[m], lo[m], hi[m])
    m = device == VENTURI_MASK
    out[m] = set_fio2[m] - 0.02 * u_venturi[m]
    return out


def charted_fio2(device: npt.NDArray[np.int64], flow: Array, set_fio2: Array) -> Array:
    """The FiO2 written in the chart: the bedside estimate for low-flow devices, else the setting."""
    out = set_fio2.astype(np.float64).copy()
    out[device == ROOM_AIR] = 0.21
    m = device == NASAL_CANNULA
    out[m] = np.round(0.20 + 0.04 * flow[m], 2)
    m = device == SIMPLE_MASK
    out[m] = np.where(flow[m] <= 6, 0.35, np.where(flow[m] <= 8, 0.40, 0.50))
    m = device == RESERVOIR_MASK
    out[m] = np.round(np.round((0.60 + 0.04 * (flow[m] - 10.0)) / 0.05) * 0.05, 2)
    return out


def charting_envelope(device: npt.NDArray[np.int64], flow: Array) -> tuple[Array, Array]:
    """The lowest and highest charted FiO2 that does not contradict the documented device and flow.

    Low-flow devices: their delivered range (room air 0.20-0.22 after rounding); Venturi valves: the
    lowest and highest labelled settings; set-FiO2 devices: 0.21-1.00. NaN when the device is unknown.
    """
    lo, hi = delivered_range(device, flow)
    lo[device == ROOM_AIR], hi[device == ROOM_AIR] = 0.20, 0.22
    m = device == VENTURI_MASK
    lo[m], hi[m] = VENTURI_SETTINGS[0], VENTURI_SETTINGS[-1]
    m = (device >= len(LOW_FLOW_DEVICES)) & (device != VENTURI_MASK)
    lo[m], hi[m] = 0.21, 1.0
    return lo, hi
