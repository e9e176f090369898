"""Checks before a run writes anything: folder permissions and free disk space.

A store that fills its disk mid-write is the riskiest failure an embedded database has, so
a run first checks that the store's folder and the output folder have room for what it is
about to write, and stops with exit 74 (and a message naming the folder and the amounts)
when they do not.
"""

from __future__ import annotations

import os
import shutil
import stat
from pathlib import Path

from pipeline.errors import ConfigError, StorageError

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
