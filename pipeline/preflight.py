"""Checks before a run writes anything: folder permissions and free disk space; and
``try_profile``, a site's check of a mapping profile on export files before the first night.

A store that fills its disk mid-write is the riskiest failure an embedded database has, so
a run first checks that the store's folder and the output folder have room for what it is
about to write, and stops with exit 74 (and a message naming the folder and the amounts)
when they do not.
"""

from __future__ import annotations

import os
import secrets
import shutil
import stat
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from pipeline.contract import ContractSettings
from pipeline.errors import ConfigError, StorageError
from pipeline.ingest.load import FileOutcome, ingest_file
from pipeline.profile import Profile
from pipeline.store import open_scratch_store

MIB = 1024**2
# Room a run needs whatever its input: DuckDB's write-ahead log, a checkpoint and spill
# files on the store's side; the report, tables and workbook on the output side.
MIN_FREE_STORE_BYTES = 256 * MIB
MIN_FREE_OUTPUT_BYTES = 64 * MIB
# New input is parsed, staged and stored; a store grows by less than this multiple of it.
INPUT_GROWTH_FACTOR = 3


def _existing(folder: Path) -> Path:
    """The folder itself, or its nearest existing parent (where it will be created)."""
    folder = folder.absolute()
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    return folder


def _fmt(size: int) -> str:
    return f"{size / MIB:,.0f} MiB"


def required_space(
    store_folder: Path, output_folder: Path, new_input_bytes: int, store_bytes: int = 0
) -> dict[Path, int]:
    """Bytes needed per existing folder: ``max(3 x new input, floor)`` plus ``store_bytes``
    (the store's own size when every derived table is rewritten) for the store, a floor for
    the outputs; summed when both folders share one file system."""
    store_need = max(INPUT_GROWTH_FACTOR * new_input_bytes, MIN_FREE_STORE_BYTES) + store_bytes
    needs: dict[Path, int] = {}
    devices: dict[int, Path] = {}
    for folder, need in ((store_folder, store_need), (output_folder, MIN_FREE_OUTPUT_BYTES)):
        where = _existing(folder)
        device = where.stat().st_dev
        if device in devices:
            needs[devices[device]] += need
        else:
            devices[device] = where
            needs[where] = need
    return needs


def check_free_space(store_folder: Path, output_folder: Path, new_input_bytes: int, store_bytes: int = 0) -> None:
    """Raise ``StorageError`` (exit 74) when a folder's file system has less room than the run needs."""
    for where, need in required_space(store_folder, output_folder, new_input_bytes, store_bytes).items():
        free = shutil.disk_usage(where).free
        if free < need:
            raise StorageError(
                f"not enough free disk space in {where}: {_fmt(free)} free, the run needs {_fmt(need)} "
                f"({INPUT_GROWTH_FACTOR} x {_fmt(new_input_bytes)} of new input, at least "
                f"{_fmt(MIN_FREE_STORE_BYTES)} for the store and {_fmt(MIN_FREE_OUTPUT_BYTES)} for outputs); "
                "nothing was written - free space and run again"
            )


def check_private_folder(folder: Path, what: str) -> None:
    """Raise ``ConfigError`` (exit 78) when an existing folder is open to group or others."""
    try:
        mode = folder.stat().st_mode
    except FileNotFoundError:
        return  # created owner-only when the run makes it
    if stat.S_IMODE(mode) & 0o077:
        raise ConfigError(
            f"the {what} folder {folder} can be read by other users (mode {stat.S_IMODE(mode):o}); "
            f"it holds patient identifiers: run chmod 700 on it"
        )
    if not os.access(folder, os.W_OK | os.X_OK):
        raise StorageError(f"the {what} folder {folder} is not writable by this user")


@dataclass
class ProfileTrial:
    """What a run would make of one export file with a profile (``abg-audit check-profile``)."""

    outcome: FileOutcome
    quarantine_reasons: dict[str, int]  # reason code -> rows
    contract_warnings: list[str]  # batch-contract checks that failed without rejecting the file


def try_profile(
    profile: Profile, paths: Sequence[Path], contract_settings: ContractSettings | None = None
) -> list[ProfileTrial]:
    """Load the files with the profile into a scratch in-memory store, exactly as a run loads
    them (``ingest_file``: dialect, columns, codes, dates, unit sanity, the batch contract,
    quarantine, duplicates), and report each outcome; nothing reaches the site's store.

    Pseudonyms are made with a throwaway key (nothing made here is kept, so the site's key is
    not needed) and identifiers are not kept. Files are loaded in the order given, into the
    same scratch store, so a repeated row counts as a duplicate as it would on a night.
    ``contract_settings``: a site's batch-contract thresholds (default: the catalogue's)."""
    key = secrets.token_hex(32).encode()
    trials = []
    with tempfile.TemporaryDirectory(prefix="abg-audit-check-") as scratch:
        con = open_scratch_store(Path(scratch) / "spill")
        try:
            for path in paths:
                outcome = ingest_file(
                    con, path, profile, "check-profile", key, keep_patient_id=False, contract_settings=contract_settings
                )
                reasons = con.execute(
                    "select reason_code, count(*) from quarantine where file_sha256 = ? group by all "
                    "order by count(*) desc, reason_code",
                    [outcome.sha256],
                ).fetchall()
                warnings = con.execute(
                    "select check_id || ': ' || observed from contract_results "
                    "where file_sha256 = ? and not success and not blocking order by check_id",
                    [outcome.sha256],
                ).fetchall()
                trials.append(ProfileTrial(outcome, dict(reasons), [w[0] for w in warnings]))
        finally:
            con.close()
    return trials
