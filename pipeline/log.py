"""Run log: readable lines by default, JSON lines on request.

Lines carry run ids, file names, reason codes and counts only; never a cell value or a
patient identifier (those stay in the protected store).
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

    def _emit(self, level: str, message: str, fields: dict[str, object]) -> None:
        if self.fmt == "json":
            record = {"time": datetime.now(UTC).isoformat(timespec="seconds"), "level": level, "message": message}
            record.update(fields)
            print(json.dumps(record, default=str), file=self.stream, flush=True)
        elif level == "error":
            print(f"error: {message}", file=self.stream, flush=True)
        elif not self.quiet:
            print(message, file=self.stream, flush=True)

    def info(self, message: str, **fields: object) -> None:
        self._emit("info", message, fields)

    def warning(self, message: str, **fields: object) -> None:
        self._emit("warning", message, fields)

    def error(self, message: str, **fields: object) -> None:
        self._emit("error", message, fields)
