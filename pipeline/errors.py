"""Named errors for problems a user can fix. Only the CLI turns them into messages and
exit codes; nothing else catches them. Messages never contain patient identifiers or
cell values from an export."""

from __future__ import annotations


class PipelineError(Exception):
    """A problem the operator can fix; printed as one line, no traceback."""

    exit_code = 70  # EX_SOFTWARE


class ConfigError(PipelineError):
    """The site configuration or a mapping profile is wrong."""

    exit_code = 78  # EX_CONFIG


class NoInputError(PipelineError):
    """An input file or folder is missing or unreadable."""

    exit_code = 66  # EX_NOINPUT


class StoreBusyError(PipelineError):
    """Another run, or another program, holds the store."""

    exit_code = 75  # EX_TEMPFAIL


class StorageError(PipelineError):
    """The store or the output folder cannot be written (disk full, permissions)."""

    exit_code = 74  # EX_IOERR


class FileRejected(PipelineError):
    """A whole export file was rejected; the message names the file and the reason."""

    exit_code = 65  # EX_DATAERR

    def __init__(self, reason_code: str, message: str) -> None:
        super().__init__(message)
        self.reason_code = reason_code


class NotHeldError(PipelineError):
    """A file named for ``abg-audit reload`` is not in the store (never loaded, or changed since)."""

    exit_code = 65  # EX_DATAERR
