"""Feed reason codes are declared once and documented; LOINC codes are checked as LOINC says.

Reason codes: every quarantine reason a feed module can emit is in ``FEED_REASONS`` (with its
meaning) or is one of the loader's documented row reasons; each feed reason is in
docs/standard-feeds.md and docs/canonical-record.md.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from pipeline.ingest.feeds.loinc import KNOWN_INVALID_CHECK_DIGITS, is_loinc_code, mod10_check_digit
from pipeline.ingest.feeds.reasons import FEED_REASONS
from pipeline.profile import load_profile

ROOT = Path(__file__).resolve().parent.parent
FEEDS = ROOT / "pipeline" / "ingest" / "feeds"


def loader_reasons() -> set[str]:
    """The loader's documented whole-file and row reasons (docs/canonical-record.md)."""
    text = (ROOT / "docs" / "canonical-record.md").read_text(encoding="utf-8")
    files = text.split("Faults that hit a whole file", 1)[1].split("\n\n", 1)[0]
    rows = text.split("Row reason codes:", 1)[1].split("FHIR and HL7 v2 feeds add", 1)[0]
    return set(re.findall(r"`([A-Z_]+)`", files + rows))


def test_every_reason_a_feed_emits_is_declared():
    emitted: set[str] = set()
    for module in FEEDS.glob("*.py"):
        source = module.read_text(encoding="utf-8")
        # Fault(order, "REASON", ...), ("REASON", detail) verdicts, TimeProblem("REASON", ...)
        emitted |= set(re.findall(r'"([A-Z][A-Z0-9]*(?:_[A-Z0-9]+)+)"', source))
    emitted -= {"BOM_STRIPPED"}  # a note of the file, as for CSV, not a reason
    unknown = emitted - set(FEED_REASONS) - loader_reasons()
    assert not unknown, unknown
    assert len(emitted & set(FEED_REASONS)) == len(FEED_REASONS)  # every declared reason is used


def test_every_feed_reason_is_documented():
    guide = (ROOT / "docs" / "standard-feeds.md").read_text(encoding="utf-8")
    record = (ROOT / "docs" / "canonical-record.md").read_text(encoding="utf-8")
    for reason in FEED_REASONS:
        assert f"| `{reason}` |" in guide, reason
        assert f"`{reason}`" in record, reason


def test_mod10_check_digit_follows_the_users_guide():
    # LOINC Users' Guide section 12 C: the worked example, 12345 -> 5
    assert mod10_check_digit("12345") == 5
    # the same guide lists 14 deprecated codes whose published check digit is wrong: accepted as published
    assert all(is_loinc_code(code) for code in KNOWN_INVALID_CHECK_DIGITS)
    assert mod10_check_digit("11491") != 6  # the guide's point: the algorithm disagrees with 11491-6


@pytest.mark.parametrize(
    ("code", "valid"),
    [
        ("2744-1", True),  # pH of Arterial blood (FHIR MCC eCare Plan IG example)
        ("2019-8", True),  # Carbon dioxide [Partial pressure] in Arterial blood (same IG)
        ("59408-5", True),  # Oxygen saturation in Arterial blood by Pulse oximetry (US Core example)
        ("3150-0", True),  # Inhaled oxygen concentration (loinc.org term)
        ("2744-7", False),  # a mistyped check digit
        ("2744", False),  # no check digit
        ("LP30884-8", False),  # a LOINC Part, not an observation code
    ],
)
def test_loinc_codes(code, valid):
    assert is_loinc_code(code) is valid


@pytest.mark.parametrize("name", ["demo_fhir", "demo_hl7v2"])
def test_every_code_of_the_demo_feed_profiles_passes_its_check_digit(name):
    profile = load_profile(ROOT / "profiles" / f"{name}.toml")
    assert profile.feed is not None
    loinc = [code for (system, code) in profile.feed.by_code if system == "loinc"]
    assert len(loinc) >= 15 and all(is_loinc_code(code) for code in loinc)
