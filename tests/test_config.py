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


@pytest.mark.parametrize(
    ("thresholds", "keys"),
    [
        # A warning limit above its strong limit: the strong flag could never be the later one.
        ("[thresholds.delayed_analysis]\nwarn_minutes = 90\n", ("warn_minutes = 90.0", "strong_minutes = 60.0")),
        ("[thresholds.delayed_analysis]\nstrong_minutes = 10\n", ("warn_minutes = 30.0", "strong_minutes = 10.0")),
        ("[thresholds.hyperoxaemia_on_oxygen]\nmoderate_pao2_mmhg = 250\n", ("moderate_pao2_mmhg", "severe_pao2_mmhg")),
        # A low above a high.
        ("[thresholds.derive]\ntarget_low = 99\n", ("target_low = 99.0", "target_high = 98.0")),
        ("[thresholds.value_outside_physiological_range]\nph_min = 8.0\n", ("ph_min = 8.0", "ph_max = 7.9")),
    ],
)
def test_contradictory_thresholds_are_configuration_errors_naming_both_keys(tmp_path, thresholds, keys):
    from click.testing import CliRunner

    from pipeline.cli import main
    from pipeline.rules import load_catalogue

    config = load_config(write(tmp_path, BASE + "\n" + thresholds))
    with pytest.raises(ConfigError) as caught:
        load_catalogue(config.thresholds)
    message = str(caught.value)
    section = thresholds.splitlines()[0]
    assert message.startswith(section) and all(key in message for key in keys), message
    shown = CliRunner().invoke(main, ["rules", "--config", str(config.path)])
    assert shown.exit_code == 78 and keys[0] in shown.output


def test_ordered_thresholds_in_the_right_order_load(tmp_path):
    from pipeline.rules import load_catalogue

    text = BASE + "\n[thresholds.delayed_analysis]\nwarn_minutes = 45\nstrong_minutes = 45\n"
    catalogue = load_catalogue(load_config(write(tmp_path, text)).thresholds)
    assert catalogue.rule("delayed_analysis").parameters == {"warn_minutes": 45.0, "strong_minutes": 45.0}
    load_catalogue()  # the catalogue's own defaults are in order
