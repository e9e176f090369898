"""The ``[audit]`` section of a site configuration: reporting period and control-chart rules.

```toml
[audit]
period = "month"            # or "week" (ISO weeks, Monday first)
history_periods = 24        # the latest periods with data that the tables cover
complete_periods_only = false # true: leave out the period still under way until it ends
                              # (default: show it, labelled partial, so a first extract is not empty)
chart_limits = "p_chart"    # or "laney": which limits the "beyond limits" signal uses
sigma = 3.0                 # control limits at centre -/+ sigma standard errors
shift_run = 8               # points in a row on one side of the centre line
trend_run = 6               # points in a row each rising (or each falling)
worklist_days = 31          # review worklist: flags on samples collected in the last 31 days
funnel_overdispersion = "additive"  # or "multiplicative" or "none": how funnel limits allow for
                            # between-unit variation beyond chance (Spiegelhalter 2005)
winsorize_pct = 10          # z-scores winsorised at this percentile each side when estimating it
```

Defaults and sources: limits at 3 sigma (Shewhart p-chart); a run of 8 on one side of the
centre line (Western Electric Statistical Quality Control Handbook, 1956; Nelson LS 1984,
J Qual Technol 16:237 uses 9; the NHS "Making Data Count" guidance uses 7); a trend of 6
points (Nelson 1984; other guides use 5-7). Citations from memory; each is a parameter.
The review worklist covers the samples collected in the ``worklist_days`` calendar days up to
the latest collection time in the store (0: every flag in the store), so the morning list
stays a morning list and its cost does not grow with the history.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import ConfigError

PERIODS = ("month", "week")
CHART_LIMITS = ("p_chart", "laney")
OVERDISPERSION = ("additive", "multiplicative", "none")
DEFAULT_HISTORY = {"month": 24, "week": 52}


@dataclass(frozen=True)
class AuditSettings:
    period: str = "month"
    history_periods: int = 24
    complete_periods_only: bool = False
    chart_limits: str = "p_chart"
    sigma: float = 3.0
    shift_run: int = 8
    trend_run: int = 6
    worklist_days: int = 31
    funnel_overdispersion: str = "additive"
    winsorize_pct: float = 10.0


def parse_audit_settings(raw: Any, source: Path | str = "site configuration") -> AuditSettings:
    """Validate an ``[audit]`` table; unknown names and out-of-range values are configuration errors."""
    if not isinstance(raw, dict):
        raise ConfigError(f"{source}: [audit] must be a table")
    known = {
        "period",
        "history_periods",
        "complete_periods_only",
        "chart_limits",
        "sigma",
        "shift_run",
        "trend_run",
        "worklist_days",
        "funnel_overdispersion",
        "winsorize_pct",
    }
    unknown = set(raw) - known
    if unknown:
        raise ConfigError(
            f"{source}: [audit] has unknown settings {', '.join(sorted(unknown))}; known: " + ", ".join(sorted(known))
        )
    period = raw.get("period", "month")
    if period not in PERIODS:
        raise ConfigError(f"{source}: [audit] period must be one of {', '.join(PERIODS)}")
    chart_limits = raw.get("chart_limits", "p_chart")
    if chart_limits not in CHART_LIMITS:
        raise ConfigError(f"{source}: [audit] chart_limits must be one of {', '.join(CHART_LIMITS)}")
    history = raw.get("history_periods", DEFAULT_HISTORY[period])
    complete_only = raw.get("complete_periods_only", False)
    if not isinstance(complete_only, bool):
        raise ConfigError(f"{source}: [audit] complete_periods_only must be true or false")
    sigma = raw.get("sigma", 3.0)
    shift_run = raw.get("shift_run", 8)
    trend_run = raw.get("trend_run", 6)
    worklist_days = raw.get("worklist_days", 31)
    for name, value, low in (
        ("history_periods", history, 1),
        ("shift_run", shift_run, 2),
        ("trend_run", trend_run, 2),
        ("worklist_days", worklist_days, 0),
    ):
        if not isinstance(value, int) or isinstance(value, bool) or value < low:
            raise ConfigError(f"{source}: [audit] {name} must be an integer of at least {low}")
    if not isinstance(sigma, (int, float)) or isinstance(sigma, bool) or not 0 < sigma <= 6:
        raise ConfigError(f"{source}: [audit] sigma must be a number above 0 and at most 6")
    overdispersion = raw.get("funnel_overdispersion", "additive")
    if overdispersion not in OVERDISPERSION:
        raise ConfigError(f"{source}: [audit] funnel_overdispersion must be one of {', '.join(OVERDISPERSION)}")
    winsorize = raw.get("winsorize_pct", 10)
    if not isinstance(winsorize, (int, float)) or isinstance(winsorize, bool) or not 0 <= winsorize < 50:
        raise ConfigError(f"{source}: [audit] winsorize_pct must be a number from 0 to below 50")
    return AuditSettings(
        period=period,
        history_periods=history,
        complete_periods_only=complete_only,
        chart_limits=chart_limits,
        sigma=float(sigma),
        shift_run=shift_run,
        trend_run=trend_run,
        worklist_days=worklist_days,
        funnel_overdispersion=overdispersion,
        winsorize_pct=float(winsorize),
    )
