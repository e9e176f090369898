"""What the standard-feed tests read off a file's outcome."""

from __future__ import annotations

from pipeline.ingest.load import FileOutcome


def counts(outcome: FileOutcome) -> tuple[int, int, int, int, int]:
    """Rows in, loaded, quarantined, duplicate, superseded in file: the reconciliation's terms."""
    return (
        outcome.rows_in,
        outcome.rows_loaded,
        outcome.rows_quarantined,
        outcome.rows_duplicate,
        outcome.rows_superseded_in_file,
    )
