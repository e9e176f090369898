"""Test-only pause points, so crash tests can kill a real run at a known place.

A run calls ``pause_point("<stage>")`` at a few named places. Nothing happens unless the
environment variable ``ABG_AUDIT_TEST_PAUSE_AT`` names that stage (``load``, ``rules``,
``checkpoint``, ``report``); then the run writes the stage name to the file named by
``ABG_AUDIT_TEST_PAUSE_SIGNAL`` (when set) and sleeps, waiting to be killed. ``load:2``
pauses the second time the ``load`` point is reached (the second file). Never set these
variables in production; they exist for the crash tests in ``tests/test_nightly.py``.
"""

from __future__ import annotations

import os
import time
from collections import Counter
from pathlib import Path

PAUSE_ENV = "ABG_AUDIT_TEST_PAUSE_AT"
SIGNAL_ENV = "ABG_AUDIT_TEST_PAUSE_SIGNAL"
PAUSE_SECONDS = 600.0

_reached: Counter[str] = Counter()


def pause_point(stage: str) -> None:
    """Sleep here if the test environment asks for it; a no-op otherwise."""
    wanted = os.environ.get(PAUSE_ENV)
    if not wanted:
        return
    name, _, nth = wanted.partition(":")
    if name != stage:
        return
    _reached[stage] += 1
    if _reached[stage] != (int(nth) if nth else 1):
        return
    signal = os.environ.get(SIGNAL_ENV)
    if signal:
        Path(signal).write_text(stage, encoding="utf-8")
    time.sleep(PAUSE_SECONDS)
