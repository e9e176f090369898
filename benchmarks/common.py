"""Shared pieces of the benchmark scripts.

* Demo exports of any size: the demo generator writes a base export once (about 289 k
  US-style rows over two months); larger files put earlier copies of it before it, each
  with a copy number appended to the accession and the patient identifier and its times
  moved back by the base's span, so every copy holds new samples of new patients, with
  the same value mix, earlier in time (5 M rows cover about three years).
* One measurement per fresh subprocess (``tasks.py``), so each peak RSS belongs to one
  measurement only; the subprocess times the operation itself, not interpreter start-up.
* Tables that print every figure beside its baseline from the same run.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date, timedelta
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
US_PROFILE = REPO / "profiles" / "demo_us_style.toml"
DEFAULT_WORKDIR = Path(tempfile.gettempdir()) / "abg_audit_bench"
BENCH_KEY = "benchmark-pseudonym-key-not-secret-0123456789abcdef"
# Every export, whatever its size, is made from the US-style file of one demo run of this
# many samples (about 289 k rows; under a minute and 1.3 GiB to generate), so exports of
# different sizes end with the same latest days, patients included.
BASE_SAMPLES = 1_000_000
US_DATETIME = "%m/%d/%Y %H:%M"


@dataclass
class Measurement:
    """One timed operation in its own process."""

    label: str
    seconds: float
    rows: int
    peak_rss: int  # bytes
    detail: dict[str, Any] = field(default_factory=dict)
    runs: list[float] = field(default_factory=list)


def machine_line() -> str:
    import duckdb
    import polars as pl

    cores = os.cpu_count() or 0
    try:
        import psutil

        memory = f"{psutil.virtual_memory().total / 1024**3:.0f} GiB"
    except ImportError:  # pragma: no cover - psutil is in the test extra
        memory = "? GiB"
    return (
        f"{platform.machine()}, {cores} cores, {memory}; Python {platform.python_version()}, "
        f"duckdb {duckdb.__version__}, polars {pl.__version__}"
    )


def fmt_bytes(value: int) -> str:
    if value >= 1024**3:
        return f"{value / 1024**3:.2f} GiB"
    return f"{value / 1024**2:.0f} MiB"


def fmt_rows(value: float) -> str:
    return f"{value:,.0f}"


# --------------------------------------------------------------------------- exports


def _base_us_export(workdir: Path, samples: int, seed: int) -> Path:
    """The demo generator's US-style export for ``samples`` samples (cached)."""
    out = workdir / "generated" / f"samples{samples}_seed{seed}"
    target = out / "us_style" / "export_all.csv"
    if target.exists():
        return target
    if out.exists():
        shutil.rmtree(out)
    print(f"generating {samples:,} demo samples (seed {seed}) once into {out} ...", flush=True)
    subprocess.run(
        [sys.executable, "-m", "synthetic_data", "--rows", str(samples), "--seed", str(seed), "--single-file",
         "--out", str(out)],
        check=True,
        cwd=REPO,
        stdout=subprocess.DEVNULL,
    )
    return target


def _copy(base: Any, copy: int, span_days: int) -> Any:
    """Copy ``copy`` of the base export: new accession numbers and patients (a suffix), and
    collection and result times moved back by ``copy`` spans, so the copies precede each
    other in time like the years of a network's history."""
    import polars as pl

    if copy == 0:
        return base

    def renamed(column: str) -> pl.Expr:
        return pl.when(pl.col(column).is_null()).then(None).otherwise(pl.col(column) + f"-{copy}").alias(column)

    def moved(column: str) -> pl.Expr:
        parsed = pl.col(column).str.strptime(pl.Datetime, US_DATETIME, strict=False)
        earlier = (parsed - pl.duration(days=copy * span_days)).dt.strftime(US_DATETIME)
        return pl.coalesce(earlier, pl.col(column)).alias(column)

    return base.with_columns(renamed("Accession"), renamed("MRN"), moved("Collected"), moved("Resulted"))


def _collection_days(frame: Any) -> tuple[date, date]:
    import polars as pl

    days = frame.select(pl.col("Collected").str.strptime(pl.Datetime, US_DATETIME, strict=False).dt.date())
    return days.min().item(), days.max().item()


def us_export(workdir: Path, rows: int, seed: int = 7) -> Path:
    """A US-style demo export of exactly ``rows`` data rows (cached under ``workdir``): as
    many earlier copies of the base export as needed (see ``_copy``), oldest first, and the
    base export itself last, so the file runs forward in time and always ends with the same
    latest days."""
    import polars as pl

    target = workdir / "exports" / f"us_style_{rows}_seed{seed}.csv"
    if target.exists():
        return target
    base = pl.read_csv(_base_us_export(workdir, BASE_SAMPLES, seed), infer_schema=False)
    first, last = _collection_days(base)
    span_days = (last - first).days + 1
    target.parent.mkdir(parents=True, exist_ok=True)
    partial = target.with_suffix(".partial")
    print(f"writing a {rows:,}-row US-style export from {base.height:,} base rows ...", flush=True)
    copies = -(-rows // base.height)
    with partial.open("wb") as handle:
        for copy in reversed(range(copies)):
            part = base.tail(rows - (copies - 1) * base.height) if copy == copies - 1 else base
            _copy(part, copy, span_days).write_csv(handle, include_header=copy == copies - 1, null_value="")
    partial.rename(target)
    return target


def tail_export(workdir: Path, rows: int, of_rows: int, seed: int = 7) -> Path:
    """The last ``rows`` rows of the ``of_rows``-row export: its latest days and patients."""
    import polars as pl

    target = workdir / "exports" / f"us_style_last_{rows}_of_{of_rows}_seed{seed}.csv"
    if not target.exists():
        frame = pl.scan_csv(us_export(workdir, of_rows, seed), infer_schema=False).tail(rows).collect()
        frame.write_csv(target, null_value="")
    return target


def patients_export(workdir: Path, rows: int, of_rows: int, seed: int = 7) -> Path:
    """Every sample of about ``rows / of_rows`` of the patients of the ``of_rows``-row export,
    patients picked by a hash of their MRN: a small site with the big export's whole history
    (so the same reporting window, units and periods) and whole patient histories, in file
    order. About ``rows`` rows; the exact count depends on the patients picked."""
    import polars as pl

    target = workdir / "exports" / f"us_style_patients_{rows}_of_{of_rows}_seed{seed}.csv"
    if not target.exists():
        share = max(of_rows // rows, 1)
        picked = pl.col("MRN").hash(seed) % share == 0
        frame = pl.scan_csv(us_export(workdir, of_rows, seed), infer_schema=False).filter(picked).collect()
        frame.write_csv(target, null_value="")
    return target


def nightly_export(workdir: Path, rows: int, source: Path) -> Path:
    """``rows`` new samples of patients in ``source``, on the day after its last collection day.

    New accession numbers, the same patients, collected on the next day at the time of day
    of the sample they were copied from (result delay kept): a nightly file that extends
    patient histories at their end.
    """
    import polars as pl

    target = workdir / "exports" / f"nightly_{rows}_from_{source.stem}.csv"
    if target.exists():
        return target
    frame = pl.read_csv(source, infer_schema=False)
    _, last_day = _collection_days(frame)
    collected = pl.col("Collected").str.strptime(pl.Datetime, US_DATETIME, strict=False)
    resulted = pl.col("Resulted").str.strptime(pl.Datetime, US_DATETIME, strict=False)
    picked = frame.gather_every(max(frame.height // rows, 1)).head(rows)
    moved = pl.lit(last_day + timedelta(days=1)).cast(pl.Datetime) + (collected - collected.dt.truncate("1d"))
    picked = picked.with_columns(
        pl.when(pl.col("Accession").is_null()).then(None).otherwise(pl.col("Accession") + "-N").alias("Accession"),
        pl.coalesce(moved.dt.strftime(US_DATETIME), pl.col("Collected")).alias("Collected"),
        pl.coalesce((moved + (resulted - collected)).dt.strftime(US_DATETIME), pl.col("Resulted")).alias("Resulted"),
    )
    target.parent.mkdir(parents=True, exist_ok=True)
    picked.write_csv(target, null_value="")
    return target


# --------------------------------------------------------------------------- stores


def write_site_config(folder: Path, store: Path, inputs: Path) -> Path:
    """A site configuration for one US-style input (file or folder) and the given store."""
    from synthetic_data.hospital import SITE_ALTITUDE_M

    private_folder(folder)
    key = folder / "pseudonym.key"
    if not key.exists():
        fd = os.open(key, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as handle:
            handle.write(BENCH_KEY)
    config = folder / "site.toml"
    config.write_text(
        "[site]\n"
        'name = "benchmark (invented demo data)"\n'
        f"altitude_m = {SITE_ALTITUDE_M}\n\n"
        "[store]\n"
        f"path = {json.dumps(str(store))}\n"
        "keep_patient_id = true\n\n"
        "[output]\n"
        f"folder = {json.dumps(str(folder / 'output'))}\n\n"
        "[privacy]\n"
        f"key_file = {json.dumps(str(key))}\n\n"
        "[[inputs]]\n"
        f"path = {json.dumps(str(inputs))}\n"
        f"profile = {json.dumps(str(US_PROFILE))}\n"
        'pattern = "*.csv"\n',
        encoding="utf-8",
    )
    return config


def private_folder(path: Path) -> Path:
    """A folder only its owner can read: stores hold (invented) patient identifiers."""
    path.mkdir(parents=True, exist_ok=True, mode=0o700)
    path.chmod(0o700)
    return path


def remove_store(store: Path) -> None:
    for path in (store, store.with_name(store.name + ".wal"), store.with_name(store.name + ".lock")):
        path.unlink(missing_ok=True)
    shutil.rmtree(store.with_name(store.name + ".tmp"), ignore_errors=True)


def copy_store(source: Path, target: Path) -> None:
    remove_store(target)
    shutil.copyfile(source, target)


# --------------------------------------------------------------------------- measuring


def measure(task: str, label: str, **args: Any) -> Measurement:
    """Run one task of ``tasks.py`` in a fresh interpreter and read back its figures."""
    command = [sys.executable, str(HERE / "tasks.py"), task, json.dumps(args, default=str)]
    done = subprocess.run(command, cwd=REPO, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        sys.stderr.write(done.stderr)
        raise SystemExit(f"benchmark task {task!r} failed (exit {done.returncode})")
    result = json.loads(done.stdout.strip().splitlines()[-1])
    return Measurement(
        label=label,
        seconds=result["seconds"],
        rows=result["rows"],
        peak_rss=result["peak_rss"],
        detail=result.get("detail", {}),
        runs=[result["seconds"]],
    )


def combine(repeats: Sequence[Measurement]) -> Measurement:
    """The median time of repeated measurements, with the highest peak RSS seen."""
    first = repeats[0]
    times = [m.seconds for m in repeats]
    return Measurement(
        label=first.label,
        seconds=statistics.median(times),
        rows=first.rows,
        peak_rss=max(m.peak_rss for m in repeats),
        detail=first.detail,
        runs=times,
    )


def print_table(baseline: Measurement, others: Sequence[Measurement], *, rows_label: str = "rows/s") -> None:
    """Print each measurement beside the baseline: seconds, rate, ratio, peak RSS."""
    width = max(len(m.label) for m in [baseline, *others]) + 2
    header = f"{'measurement':<{width}}{'seconds':>9}{rows_label:>13}{'x baseline':>12}{'peak RSS':>12}   runs (s)"
    print(header)
    print("-" * len(header))
    for m in [baseline, *others]:
        rate = m.rows / m.seconds if m.seconds > 0 else float("nan")
        ratio = m.seconds / baseline.seconds if baseline.seconds > 0 else float("nan")
        runs = ", ".join(f"{t:.2f}" for t in m.runs)
        print(
            f"{m.label:<{width}}{m.seconds:>9.2f}{fmt_rows(rate):>13}{ratio:>12.2f}{fmt_bytes(m.peak_rss):>12}   {runs}"
        )


def verdict(name: str, value: float, limit: float, unit: str = "x") -> str:
    ok = "meets" if value <= limit else "MISSES"
    return f"{name}: {value:.2f}{unit} (target <= {limit:g}{unit}) -> {ok} target"
