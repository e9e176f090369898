"""Date-times of FHIR and HL7 v2 as the UTC text the loader reads (``TIME_FORMAT``).

FHIR ``dateTime`` and ``instant`` carry their offset whenever they carry a time (FHIR R4
data types, datatypes.html, dateTime: "If hours and minutes are specified, a time zone SHALL
be populated"). HL7 v2 DTM is ``YYYY[MM[DD[HH[MM[SS[.S[S[S[S]]]]]]]]][+/-ZZZZ]`` (HL7 v2.5.1
chapter 2A, data type DTM); a time without an offset is the sender's local time, read
in the profile's time zone. A local time the clocks skipped or passed twice is quarantined
with the loader's own reasons (``DST_NONEXISTENT``, ``DST_AMBIGUOUS``).
"""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

TIME_FORMAT = "%Y-%m-%d %H:%M:%S"
_DTM = re.compile(r"^(\d{4})(\d{2})(\d{2})(\d{2})(\d{2})(\d{2})?(?:\.\d{1,4})?([+-]\d{4})?$")


class TimeProblem(ValueError):
    """A date-time that cannot become one UTC moment; ``reason`` is the quarantine reason."""

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(detail)
        self.reason = reason


def fhir_to_utc(text: str | None) -> str | None:
    """A FHIR dateTime with a time as UTC text; text without a time (a date, a year) is
    handed on as written, so the loader's date-time check quarantines it by its own rule."""
    if not text:
        return None
    if "T" not in text:
        return text
    try:
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        return text
    if moment.tzinfo is None:
        return text
    return moment.astimezone(UTC).strftime(TIME_FORMAT)


def hl7_to_utc(text: str | None, zone: str) -> str | None:
    """An HL7 v2 DTM with at least minutes as UTC text; other text handed on as written
    (the loader quarantines it as ``DATE_UNPARSEABLE``). Raises TimeProblem for a local
    time that does not exist or exists twice in ``zone``."""
    if not text:
        return None
    match = _DTM.match(text.strip())
    if match is None:
        return text
    year, month, day, hour, minute, second, offset = match.groups()
    try:
        naive = datetime(int(year), int(month), int(day), int(hour), int(minute), int(second or 0))
    except ValueError:
        return text
    if offset:
        sign = 1 if offset[0] == "+" else -1
        delta = timedelta(hours=int(offset[1:3]), minutes=int(offset[3:5]))
        return (naive - sign * delta).strftime(TIME_FORMAT)
    tz = ZoneInfo(zone)
    early = naive.replace(tzinfo=tz, fold=0)
    late = naive.replace(tzinfo=tz, fold=1)
    if early.utcoffset() != late.utcoffset():
        # fold picks between two offsets: the wall time is in a gap (skipped) or an overlap (twice)
        round_trip = early.astimezone(UTC).astimezone(tz).replace(tzinfo=None)
        if round_trip != naive:
            raise TimeProblem("DST_NONEXISTENT", f"local time {text} does not exist in {zone}")
        raise TimeProblem("DST_AMBIGUOUS", f"local time {text} happens twice in {zone}")
    return early.astimezone(UTC).strftime(TIME_FORMAT)
