"""The end-of-run summary printed for the operator: per file and totals, reconciled."""

from __future__ import annotations

import click

from pipeline.audience import internal
from pipeline.config import SiteConfig
from pipeline.report import REPORT_NAME, RESTRICTED_DIR
from pipeline.run import RunResult
from pipeline.schema import PRESCRIPTIONS, SAMPLES


def print_run_summary(result: RunResult, config: SiteConfig) -> None:
    loaded = [f for f in result.files if f.outcome == "loaded"]
    rejected = [f for f in result.files if f.outcome == "rejected"]
    skipped = [f for f in result.files if f.outcome == "already_loaded"]
    rows_in = result.total("rows_in")
    parts = (
        result.total("rows_loaded")
        + result.total("rows_quarantined")
        + result.total("rows_duplicate")
        + result.total("rows_superseded_in_file")
    )
    click.echo("")
    click.echo(f"Run {result.run_id}  store: {config.store_path}")
    click.echo(f"  files: {len(loaded)} loaded, {len(skipped)} already loaded, {len(rejected)} rejected")
    click.echo(
        f"  rows in {rows_in} = loaded {result.total('rows_loaded')} + quarantined {result.total('rows_quarantined')}"
        f" + duplicates {result.total('rows_duplicate')} + superseded in file {result.total('rows_superseded_in_file')}"
        f"  [{'balanced' if rows_in == parts else 'NOT BALANCED'}]"
    )
    for record in (SAMPLES, PRESCRIPTIONS):
        corrections = sum(f.corrections for f in result.files if f.kind == record.kind)
        if corrections:
            click.echo(
                f"  corrections: {corrections} {record.kind} replaced an earlier version "
                f"(kept in {record.superseded_table})"
            )
    # Where the outputs are: the log line naming their folder has scrolled away by now.
    folder, edition = config.output_folder, internal(config)
    click.echo(
        f"  outputs: {folder / REPORT_NAME} and the tables beside it; row-level files in {folder / RESTRICTED_DIR}"
        + (f"; the internal edition in {edition.folder}" if edition else "")
    )
    for f in rejected:
        click.echo(f"  rejected {f.path.name} ({f.reason_code}): {f.message}")
    for missing in result.missing_inputs:
        click.echo(f"  missing input: {missing}")
    click.echo("  Audit aid only, not a diagnostic device; thresholds follow local policy and clinical judgement.")
