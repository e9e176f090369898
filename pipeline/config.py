"""Site configuration: one TOML file drives a run. Paths are relative to the file."""

from __future__ import annotations

import hashlib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.audit_settings import AuditSettings, parse_audit_settings
from pipeline.contract import ContractSettings, load_settings, settings_with
from pipeline.errors import ConfigError
from pipeline.profile import Profile, load_profile
from pipeline.schema import RECORD_SPECS


@dataclass(frozen=True)
class InputSource:
    path: Path  # a file or a folder
    profile: Profile
    pattern: str = "*"
    kind: str = "samples"  # samples (blood gas results) or prescriptions (the oxygen prescriptions feed)

    def files(self) -> list[Path]:
        if self.path.is_file():
            return [self.path]
        return sorted(p for p in self.path.glob(self.pattern) if p.is_file() and not p.name.startswith("."))


@dataclass(frozen=True)
class OxygenTarget:
    """A site's saturation target for one unit type; ``assessed=False``: no target (not assessed)."""

    low_pct: float | None = None
    high_pct: float | None = None
    assessed: bool = True


# Unit types whose patients have no adult target unless the site sets one (common practice:
# paediatric and neonatal targets are local policy and differ by age and condition).
UNTARGETED_UNIT_TYPES = ("paediatric", "neonatal")


@dataclass(frozen=True)
class SiteConfig:
    path: Path | None
    site_name: str
    store_path: Path
    output_folder: Path
    key_file: Path | None
    inputs: tuple[InputSource, ...]
    altitude_m: float | None = None
    barometric_pressure_mmhg: float | None = None
    keep_patient_id: bool = True
    small_cell_threshold: int = 11
    internal_small_cell_threshold: int | None = None
    thresholds: dict[str, Any] = field(default_factory=dict)
    audit: AuditSettings = field(default_factory=AuditSettings)
    unit_types: dict[str, str] = field(default_factory=dict)
    oxygen_targets: dict[str, OxygenTarget] = field(default_factory=dict)
    sha256: str = ""
    # The batch contract's thresholds: the catalogue's [contract] with the site's overrides.
    contract: ContractSettings = field(default_factory=load_settings)

    def unit_target_rows(self) -> list[tuple[str, str, float | None, float | None, bool]]:
        """(unit, unit type, target low, target high, assessed) for every unit the site typed."""
        rows = []
        for unit, unit_type in sorted(self.unit_types.items()):
            target = self.oxygen_targets.get(
                unit_type, OxygenTarget(assessed=unit_type not in UNTARGETED_UNIT_TYPES)
            )
            rows.append((unit, unit_type, target.low_pct, target.high_pct, target.assessed))
        return rows


def _resolve(base: Path, value: object, what: str) -> Path:
    if not isinstance(value, str) or not value:
        raise ConfigError(f"{what} must be a path string")
    path = Path(value).expanduser()
    return path if path.is_absolute() else (base / path)


# Every key a site configuration may hold; anything else is a typo and an error, because a
# silently ignored key can do harm (a misspelt keep_patient_id keeps identifiers).
KNOWN_KEYS: dict[str, set[str]] = {
    "site": {"name", "altitude_m", "barometric_pressure_mmhg"},
    "store": {"path", "keep_patient_id"},
    "output": {"folder"},
    "privacy": {"key_file", "small_cell_threshold", "internal_small_cell_threshold"},
    "inputs": {"path", "profile", "pattern", "kind"},
    "thresholds": set(),  # checked against the rule catalogue by pipeline.rules.load_catalogue
    "audit": set(),  # checked by pipeline.audit_settings.parse_audit_settings
    "unit_types": set(),  # unit name = unit type; any unit name
    "oxygen_targets": set(),  # [oxygen_targets.<unit type>]; checked by _parse_oxygen_targets
    "contract": set(),  # batch contract thresholds; checked by pipeline.contract.settings_with
}


def _parse_unit_types(path: Path, raw: Any) -> dict[str, str]:
    if not isinstance(raw, dict) or not all(isinstance(v, str) and v for v in raw.values()):
        raise ConfigError(f'{path}: [unit_types] maps unit names to unit types, e.g. "Heron ICU" = "critical_care"')
    return {str(k): v for k, v in raw.items()}


def _parse_oxygen_targets(path: Path, raw: Any, unit_types: dict[str, str]) -> dict[str, OxygenTarget]:
    if not isinstance(raw, dict):
        raise ConfigError(f"{path}: [oxygen_targets.<unit type>] sections need low_pct and high_pct, or assess = false")
    targets = {}
    for unit_type, table in raw.items():
        where = f"{path}: [oxygen_targets.{unit_type}]"
        if unit_type not in set(unit_types.values()):
            raise ConfigError(f"{where}: no unit has this type in [unit_types]")
        if not isinstance(table, dict) or set(table) - {"low_pct", "high_pct", "assess"}:
            raise ConfigError(f"{where}: known keys are low_pct, high_pct and assess")
        if table.get("assess", True) is False:
            targets[unit_type] = OxygenTarget(assessed=False)
            continue
        low, high = table.get("low_pct"), table.get("high_pct")
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in (low, high)) or not (
            50 <= low < high <= 100  # type: ignore[operator]
        ):
            raise ConfigError(f"{where}: low_pct and high_pct must be numbers with 50 <= low_pct < high_pct <= 100")
        targets[unit_type] = OxygenTarget(float(low), float(high))  # type: ignore[arg-type]
    return targets


def _check_keys(path: Path, raw: dict[str, Any]) -> None:
    unknown_sections = sorted(set(raw) - set(KNOWN_KEYS))
    if unknown_sections:
        raise ConfigError(
            f"{path}: unknown section(s) {', '.join(unknown_sections)}; known: {', '.join(sorted(KNOWN_KEYS))}"
        )
    for section, known in KNOWN_KEYS.items():
        if not known or section not in raw:
            continue
        tables = raw[section] if isinstance(raw[section], list) else [raw[section]]
        for table in tables:
            if not isinstance(table, dict):
                raise ConfigError(f"{path}: [{section}] must be a table")
            unknown = sorted(set(table) - known)
            if unknown:
                raise ConfigError(
                    f"{path}: unknown key(s) in [{section}]: {', '.join(unknown)}; known: {', '.join(sorted(known))}"
                )


def load_config(path: Path | str, *, store: Path | None = None, output: Path | None = None) -> SiteConfig:
    """Read the site configuration; ``store``/``output`` override it (command-line options)."""
    path = Path(path)
    try:
        data = path.read_bytes()
        raw = tomllib.loads(data.decode("utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"{path}: site configuration not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise ConfigError(f"{path}: not valid TOML ({err})") from None
    base = path.resolve().parent
    _check_keys(path, raw)
    site = raw.get("site", {})
    store_section = raw.get("store", {})
    privacy = raw.get("privacy", {})
    inputs_raw = raw.get("inputs", [])
    if not isinstance(inputs_raw, list) or not inputs_raw:
        raise ConfigError(f"{path}: needs at least one [[inputs]] entry with path and profile")
    profiles: dict[Path, Profile] = {}
    inputs = []
    for number, item in enumerate(inputs_raw, start=1):
        if "path" not in item or "profile" not in item:
            raise ConfigError(f"{path}: [[inputs]] entry {number} needs both path and profile")
        profile_path = _resolve(base, item["profile"], f"[[inputs]] {number} profile")
        if profile_path not in profiles:
            profiles[profile_path] = load_profile(profile_path)
        kind = item.get("kind", "samples")
        if kind not in RECORD_SPECS:
            raise ConfigError(
                f"{path}: [[inputs]] entry {number} kind = {kind!r}; expected one of {', '.join(RECORD_SPECS)}"
            )
        profile = profiles[profile_path]
        if profile.kind != kind:
            raise ConfigError(
                f"{path}: [[inputs]] entry {number} is kind = {kind!r} but its profile {profile_path.name} "
                f'maps {profile.kind}; set [profile] kind = "{kind}" in the profile or kind = "{profile.kind}" '
                "in the input"
            )
        inputs.append(
            InputSource(
                path=_resolve(base, item["path"], f"[[inputs]] {number} path"),
                profile=profile,
                pattern=str(item.get("pattern", "*")),
                kind=kind,
            )
        )
    altitude = site.get("altitude_m")
    pressure = site.get("barometric_pressure_mmhg")
    for name, value in (("altitude_m", altitude), ("barometric_pressure_mmhg", pressure)):
        if value is not None and not isinstance(value, (int, float)):
            raise ConfigError(f"{path}: [site] {name} must be a number")
    if pressure is not None and not 300 <= pressure <= 800:
        raise ConfigError(f"{path}: [site] barometric_pressure_mmhg {pressure} is outside 300-800 mmHg")
    threshold = privacy.get("small_cell_threshold", 11)
    if not isinstance(threshold, int) or threshold < 1:
        raise ConfigError(f"{path}: [privacy] small_cell_threshold must be a positive integer")
    internal = privacy.get("internal_small_cell_threshold")
    if internal is not None and (
        not isinstance(internal, int) or isinstance(internal, bool) or not 1 <= internal <= threshold
    ):
        raise ConfigError(
            f"{path}: [privacy] internal_small_cell_threshold must be an integer from 1 to small_cell_threshold "
            f"({threshold}): it is the lower threshold for the hospital's own quality meetings"
        )
    key_file = privacy.get("key_file")
    unit_types = _parse_unit_types(path, raw.get("unit_types", {}))
    oxygen_targets = _parse_oxygen_targets(path, raw.get("oxygen_targets", {}), unit_types)
    contract_raw = raw.get("contract", {})
    if not isinstance(contract_raw, dict):
        raise ConfigError(f"{path}: [contract] must be a table")
    contract = settings_with(load_settings(), contract_raw, str(path))
    return SiteConfig(
        path=path,
        site_name=str(site.get("name", "unnamed site")),
        store_path=store or _resolve(base, store_section.get("path", "store/abg_audit.duckdb"), "[store] path"),
        output_folder=output or _resolve(base, raw.get("output", {}).get("folder", "out"), "[output] folder"),
        key_file=_resolve(base, key_file, "[privacy] key_file") if key_file else None,
        inputs=tuple(inputs),
        altitude_m=float(altitude) if altitude is not None else None,
        barometric_pressure_mmhg=float(pressure) if pressure is not None else None,
        keep_patient_id=bool(store_section.get("keep_patient_id", True)),
        small_cell_threshold=threshold,
        internal_small_cell_threshold=internal,
        thresholds=dict(raw.get("thresholds", {})),
        audit=parse_audit_settings(raw.get("audit", {}), path),
        unit_types=unit_types,
        oxygen_targets=oxygen_targets,
        sha256=hashlib.sha256(data).hexdigest(),
        contract=contract,
    )
