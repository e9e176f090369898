"""Run log: readable lines by default, JSON lines on request.

Lines carry run ids, file names, reason codes and counts only; never a cell value or a
patient identifier (those stay in the protected store).

On an interactive terminal (text format only) ``progress`` keeps one status line updated
in place with a carriage return; in a log file, a pipe or JSON mode it writes nothing.
"""

from __future__ import annotations

import json
import sys
from datetime import UTC, datetime
from typing import TextIO


class Log:
    def __init__(self, fmt: str = "text", stream: TextIO | None = None, quiet: bool = False) -> None:
        self.fmt = fmt
        self.stream = stream or sys.stderr
        self.quiet = quiet
        self._status_shown = False

    @property
    def interactive(self) -> bool:
        isatty = getattr(self.stream, "isatty", None)
        return self.fmt == "text" and not self.quiet and bool(isatty and isatty())

    def progress(self, status: str) -> None:
        """Show ``status`` on the terminal's last line, replacing the previous status."""
        if not self.interactive:
            return
        self.stream.write("\r\x1b[K" + status[:100])
        self.stream.flush()
        self._status_shown = True

    def clear_progress(self) -> None:
        if self._status_shown:
            self.stream.write("\r\x1b[K")
            self._status_shown = False

    def _emit(self, level: str, message: str, fields: dict[str, object]) -> None:
        self.clear_progress()
        if self.fmt == "json":
            record = {"time": datetime.now(UTC).isoformat(timespec="seconds"), "level": level, "message": message}
            record.update(fields)
            print(json.dumps(record, default=str), file=self.stream, flush=True)
        elif level in ("error", "warning"):
            print(f"{level}: {message}", file=self.stream, flush=True)
        elif not self.quiet:
            print(message, file=self.stream, flush=True)

    def info(self, message: str, **fields: object) -> None:
        self._emit("info", message, fields)

    def warning(self, message: str, **fields: object) -> None:
        self._emit("warning", message, fields)

    def error(self, message: str, **fields: object) -> None:
        self._emit("error", message, fields)
