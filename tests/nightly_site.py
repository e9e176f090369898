"""A small invented site for the nightly-operation tests: a profile, a site configuration
and export files with clean rows, rows that fail, a duplicate and a rejected file.

Everything is invented. Sample ids look like ``S<day>-<n>``; patient ids are built by a
function so the privacy test can plant distinctive identifiers.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import duckdb
import pytest

FIXTURES = Path(__file__).parent / "fixtures"
KEY = "nightly-test-key-0123456789abcdef"
HEADER = "id,mrn,ward,collected,resulted,type,device,fio2,ph,pco2,po2,hco3\n"
SITE = """\
[site]
name = "Invented test site"
barometric_pressure_mmhg = 760

[store]
path = "store/abg_audit.duckdb"
keep_patient_id = {keep}

[output]
folder = "output"

[privacy]
key_file = "secrets/pseudonym.key"
small_cell_threshold = 3

[[inputs]]
path = "exports"
profile = "profile.toml"
pattern = "*.csv"
"""


@pytest.fixture(autouse=True)
def keep_umask():
    """The command line sets an owner-only umask for its process (CliRunner runs it in the
    test's process); give the test process its own back. Import it into a test module."""
    mask = os.umask(0o022)
    os.umask(mask)
    yield
    os.umask(mask)


def default_patient(number: int) -> str:
    return f"P{number:04d}"


def day_rows(day: int, count: int, patient: Callable[[int], str] = default_patient) -> list[str]:
    """Rows of one day: mostly clean room-air arterial samples, every 7th with a PaO2 the
    alveolar gas equation does not allow on room air (a flag), every 11th venous."""
    rows = []
    for n in range(1, count + 1):
        pid = patient(day * 100 + n % 9)  # patients recur within a day and across days
        po2 = 150 if n % 7 == 0 else 80 + n % 15
        kind = "V" if n % 11 == 0 else "A"
        minute = n % 60
        rows.append(
            f"S{day}-{n},{pid},W{n % 3 + 1},2026-03-{day:02d} 10:{minute:02d},2026-03-{day:02d} 11:{minute:02d},"
            f"{kind},RA,0.21,7.{38 + n % 5},{38 + n % 6},{po2},24\n"
        )
    return rows


def bad_rows(day: int, patient: Callable[[int], str] = default_patient) -> list[str]:
    """Rows that cannot become records: unparseable pH, unknown sample type, too many fields."""
    return [
        f"Q{day}-1,{patient(9000 + day)},W1,2026-03-{day:02d} 12:00,2026-03-{day:02d} 12:05,A,RA,0.21,abc,40,90,24\n",
        f"Q{day}-2,{patient(9100 + day)},W2,2026-03-{day:02d} 12:10,2026-03-{day:02d} 12:15,Z,RA,0.21,7.4,40,90,24\n",
        f"Q{day}-3,{patient(9200 + day)},W2,2026-03-{day:02d} 12:20,2026-03-{day:02d} 12:25,A,RA,0.21,7.4,40,90,24,x\n",
    ]


def make_site(
    root: Path,
    *,
    days: int = 3,
    rows_per_day: int = 30,
    patient: Callable[[int], str] = default_patient,
    keep_patient_id: bool = True,
    rejected_file: bool = True,
) -> Path:
    """Write the site under ``root`` and return the configuration path."""
    root.mkdir(parents=True, exist_ok=True)
    secrets = root / "secrets"
    secrets.mkdir(mode=0o700, exist_ok=True)
    key = secrets / "pseudonym.key"
    key.write_text(KEY, encoding="utf-8")
    key.chmod(0o600)
    shutil.copy(FIXTURES / "profiles" / "minimal.toml", root / "profile.toml")
    exports = root / "exports"
    exports.mkdir(exist_ok=True)
    for day in range(1, days + 1):
        add_day(root, day, rows_per_day, patient)
    if rejected_file:
        # The required collection-time column is missing: the whole file is rejected.
        header = HEADER.replace(",collected,", ",drawn,")
        (exports / "day99_rejected.csv").write_text(header + "".join(day_rows(9, 5, patient)), encoding="utf-8")
    config = root / "site.toml"
    config.write_text(SITE.format(keep="true" if keep_patient_id else "false"), encoding="utf-8")
    return config


def add_day(root: Path, day: int, rows_per_day: int = 30, patient: Callable[[int], str] = default_patient) -> Path:
    """One export file; from day 2 on it repeats one row of the day before (a duplicate)."""
    rows = day_rows(day, rows_per_day, patient) + bad_rows(day, patient)
    if day > 1:
        rows.append(day_rows(day - 1, 1, patient)[0])
    path = root / "exports" / f"day{day:02d}.csv"
    path.write_text(HEADER + "".join(rows), encoding="utf-8")
    return path


def env(**extra: str) -> dict[str, str]:
    """Environment of a subprocess run: nothing inherited from ABG_AUDIT_* (key, pause hooks)."""
    base = {k: v for k, v in os.environ.items() if not k.startswith("ABG_AUDIT_")}
    base.update(extra)
    return base


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "pipeline.cli", *args]


def run_cli(*args: str, timeout: float = 240, **extra: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(cli(*args), env=env(**extra), capture_output=True, text=True, timeout=timeout)


def store_totals(store: Path) -> dict[str, object]:
    """Counts and content checksums of the store's tables, independent of run ids and times."""
    con = duckdb.connect(str(store), read_only=True)
    try:
        one = lambda sql: con.execute(sql).fetchall()[0][0]  # noqa: E731
        return {
            "records": one("select count(*) from records"),
            "distinct_samples": one("select count(distinct sample_id) from records"),
            "records_content": one("select sum(hash(sample_id, patient_key, pao2_mmhg, ph, version)) from records"),
            "quarantine": one("select count(*) from quarantine"),
            "quarantine_content": one("select sum(hash(source_row, reason_code, original_text)) from quarantine"),
            "merged_duplicates": one("select count(*) from merged_duplicates"),
            "ingested_files": one("select count(*) from ingested_files"),
            "derived": one("select count(*) from derived"),
            "derived_content": one("select sum(hash(sample_id, round(aa_gradient_mmhg, 6))) from derived"),
            "flags": one("select count(*) from flags"),
            "flags_content": one("select sum(hash(sample_id, rule_id, severity, evidence)) from flags"),
            "audit_status": one("select count(*) from audit_status"),
            "duplicate_flag_rows": one(
                "select count(*) from (select sample_id, rule_id from flags group by all having count(*) > 1)"
            ),
        }
    finally:
        con.close()
