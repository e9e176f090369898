"""Site configuration: typos are errors, never silently ignored settings."""

from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.config import load_config
from pipeline.errors import ConfigError

PROFILE = Path(__file__).parent / "fixtures" / "profiles" / "minimal.toml"
BASE = f"""
[store]
path = "store/s.duckdb"
keep_patient_id = false

[[inputs]]
path = "in"
profile = "{PROFILE.as_posix()}"
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "site.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_a_valid_configuration_loads(tmp_path):
    config = load_config(write(tmp_path, BASE))
    assert config.keep_patient_id is False
    assert config.store_path == tmp_path / "store" / "s.duckdb"


@pytest.mark.parametrize(
    ("typo", "named"),
    [
        (BASE.replace("keep_patient_id", "keep_patient_ids"), "keep_patient_ids"),  # would keep identifiers
        (BASE + "\n[outputs]\nfolder = 'x'\n", "outputs"),
        (BASE + "\n[site]\naltitude = 35\n", "altitude"),
        (BASE + "\n[threshold.delayed_analysis]\nwarn_minutes = 20\n", "threshold"),
        (BASE.replace('path = "in"', 'path = "in"\npatern = "*.csv"'), "patern"),
    ],
)
def test_unknown_sections_and_keys_are_errors(tmp_path, typo, named):
    with pytest.raises(ConfigError, match=named):
        load_config(write(tmp_path, typo))
