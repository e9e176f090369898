"""Command line: ``abg-audit``. Thin commands over the stage functions.

Only this module turns ``PipelineError`` into a one-line message and an exit code.
"""

from __future__ import annotations

import errno
import functools
import os
import sys
import traceback
from collections.abc import Callable
from pathlib import Path
from typing import Any

import click

from pipeline import __version__
from pipeline.errors import PipelineError
from pipeline.pseudonym import KEY_FORMAT_HELP

EXIT_CODES_HELP = """\b
Exit codes (BSD sysexits):
  0   every file loaded or already loaded; report: outputs written; check-profile: no file would be rejected
  65  data error: at least one file was rejected (the others loaded); check-profile: a file would be rejected
  66  no input: an input file or folder does not exist
  70  internal error (a bug; please report it with the log)
  74  I/O error: the store or output cannot be written, or too little free disk space
  75  temporary failure: another run or program holds the store; retry later
  78  configuration error: site configuration, profile, pseudonym key or folder permissions"""

DEBUG_ENV = "ABG_AUDIT_DEBUG"
RUN_EPILOG = f"{KEY_FORMAT_HELP}\n\n{EXIT_CODES_HELP}"
# detection-report loads nothing: its 0 and 1 are about the targets, the rest as for every command
DETECTION_EXIT_CODES_HELP = "\n".join(
    [*EXIT_CODES_HELP.splitlines()[:2], "  0   every detection target met", "  1   a detection target missed"]
    + [line for line in EXIT_CODES_HELP.splitlines()[2:] if not line.lstrip().startswith(("0 ", "65 "))]
)


def _silence_closed_pipe() -> None:
    """The reader of our output went away (``abg-audit rules | head``): point stdout at
    /dev/null so the interpreter's final flush cannot fail again and print a traceback."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):
        pass  # stdout is not a file descriptor (a test runner's buffer): nothing to flush


class _PipeSafe:
    """A log stream that stops writing when its reader goes away instead of failing the run:
    a run whose log was piped into ``head`` still finishes its work and exits with its code."""

    def __init__(self, stream: Any) -> None:
        self._stream = stream
        self._closed = False

    def write(self, text: str) -> int:
        if not self._closed:
            try:
                return self._stream.write(text)
            except BrokenPipeError:
                self._closed = True
        return len(text)

    def flush(self) -> None:
        if not self._closed:
            try:
                self._stream.flush()
            except BrokenPipeError:
                self._closed = True

    def isatty(self) -> bool:
        return not self._closed and self._stream.isatty()


def _log(log_format: str) -> Any:
    from pipeline.log import Log

    return Log(log_format, stream=_PipeSafe(sys.stderr))


def _echo_summary(print_summary: Callable[[], None]) -> None:
    """Print the end-of-run summary; a closed pipe loses the summary, never the run's exit code."""
    try:
        print_summary()
        sys.stdout.flush()
    except BrokenPipeError:
        _silence_closed_pipe()


def _where(err: BaseException) -> str:
    """File, line and function where an exception was raised: no values, no message."""
    frames = traceback.extract_tb(err.__traceback__)
    if not frames:
        return "unknown place"
    last = frames[-1]
    return f"{Path(last.filename).name}:{last.lineno} in {last.name}"


def handle_errors(func: Callable[..., Any]) -> Callable[..., Any]:
    """Every failure becomes one line on stderr and its exit code; no traceback.

    Messages of unexpected exceptions are not printed: parser and database errors can quote
    the cell that failed, and a cell can be a patient identifier. Set ``ABG_AUDIT_DEBUG=1``
    for the full traceback on a developer's machine (it may show data).
    """

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            try:
                return func(*args, **kwargs)
            finally:
                sys.stdout.flush()  # a reader that went away shows here, while it can still be handled
        except PipelineError as err:
            click.echo(f"error: {err}", err=True)
            sys.exit(err.exit_code)
        except click.ClickException:
            raise  # usage errors: click prints them and exits 2
        except BrokenPipeError:
            # Whoever read the output has what they wanted (`abg-audit rules | head`): not an error.
            _silence_closed_pipe()
            sys.exit(0)
        except OSError as err:
            if os.environ.get(DEBUG_ENV):
                raise
            full = " (disk full)" if err.errno in (errno.ENOSPC, errno.EDQUOT) else ""
            name = f" {Path(err.filename).name}" if err.filename else ""
            click.echo(f"error: I/O error on{name}: {err.strerror or type(err).__name__}{full}", err=True)
            sys.exit(74)
        except Exception as err:
            if os.environ.get(DEBUG_ENV):
                raise
            import duckdb

            if isinstance(err, duckdb.IOException):
                click.echo(
                    f"error: the store could not be read or written (I/O error at {_where(err)}); "
                    "check free disk space and permissions, then run again",
                    err=True,
                )
                sys.exit(74)
            click.echo(
                f"error: internal error ({type(err).__name__} at {_where(err)}); work committed before it is kept, "
                f"the rest was rolled back. Please report it; {DEBUG_ENV}=1 shows the traceback",
                err=True,
            )
            sys.exit(70)

    return wrapper


config_option = click.option(
    "--config",
    "config_path",
    type=click.Path(dir_okay=False, path_type=Path),
    required=True,
    help="Site configuration file (TOML): inputs with their profiles, store, output folder.",
)
store_option = click.option(
    "--store", type=click.Path(dir_okay=False, path_type=Path), help="DuckDB store file (overrides the configuration)."
)
output_option = click.option(
    "--output", type=click.Path(file_okay=False, path_type=Path), help="Output folder (overrides the configuration)."
)
log_format_option = click.option(
    "--log-format", type=click.Choice(["text", "json"]), default="text", show_default=True, help="Log line format."
)


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="abg-audit")
def main() -> None:
    """Audit arterial blood gas records: load exports into a DuckDB store and check them.

    An audit aid for laboratory and quality teams, not a diagnostic device: thresholds
    follow local policy and licensed clinical judgement.
    """
    os.umask(0o077)  # the store, its write-ahead log and spill files hold identifiers: owner only


@main.command(epilog=RUN_EPILOG)
@config_option
@store_option
@output_option
@log_format_option
@click.option(
    "--rebuild",
    is_flag=True,
    help="Recompute derived metrics, flags and audit tables for every sample in the store, "
    "and read and hash every input file again.",
)
@handle_errors
def run(config_path: Path, store: Path | None, output: Path | None, log_format: str, rebuild: bool) -> None:
    """Load new export files and run every stage (the nightly job).

    Files already loaded (same content hash) are skipped, and only new or corrected samples
    (and other samples of the same patients) are checked, so re-running is safe and a run
    with nothing new takes seconds. One run at a time: a second run exits with 75. A run
    killed at any point leaves the store consistent; the next run finishes its work.
    After changing the rule catalogue, thresholds or the site's pressure every sample is
    checked again automatically; use --rebuild to force it.

    \b
    Examples:
      abg-audit run --config site.toml
      abg-audit run --config site.toml --rebuild --log-format json
    """
    from pipeline.config import load_config
    from pipeline.run import run_pipeline
    from pipeline.summary import print_run_summary

    config = load_config(config_path, store=store, output=output)
    result = run_pipeline(config, _log(log_format), rebuild=rebuild)
    _echo_summary(lambda: print_run_summary(result, config))
    sys.exit(result.exit_code)


@main.command(epilog=EXIT_CODES_HELP)
@config_option
@store_option
@output_option
@click.option(
    "--period",
    type=click.Choice(["month", "week"]),
    help="Reporting period of the audit tables (overrides [audit] period of the configuration).",
)
@log_format_option
@handle_errors
def report(config_path: Path, store: Path | None, output: Path | None, period: str | None, log_format: str) -> None:
    """Rebuild the audit tables and every output from the store, loading nothing.

    Writes the aggregate tables (Parquet, CSV), the Excel workbook and the HTML report to
    the output folder, and the review worklist to its restricted subfolder.

    \b
    Example:
      abg-audit report --config site.toml --period week
    """
    import dataclasses

    from pipeline.audit_settings import DEFAULT_HISTORY
    from pipeline.config import load_config
    from pipeline.reload import warn_outdated
    from pipeline.report import REPORT_NAME, rebuild_outputs
    from pipeline.store import open_store

    config = load_config(config_path, store=store, output=output)
    if period and period != config.audit.period:
        audit = dataclasses.replace(config.audit, period=period, history_periods=DEFAULT_HISTORY[period])
        config = dataclasses.replace(config, audit=audit)
    log = _log(log_format)
    written = rebuild_outputs(config, log)
    con = open_store(config.store_path, read_only=True)
    try:
        warn_outdated(con, config, log)
    finally:
        con.close()
    click.echo(f"{len(written)} files written; report: {config.output_folder / REPORT_NAME}")
    click.echo("  Audit aid only, not a diagnostic device; thresholds follow local policy and clinical judgement.")


@main.command(epilog=EXIT_CODES_HELP)
@click.option(
    "--rows",
    type=click.IntRange(100, 10_000_000),
    default=20_000,
    show_default=True,
    help="Number of invented blood gas samples to generate.",
)
@click.option("--seed", type=int, default=7, show_default=True, help="Random seed (same seed, same data).")
@click.option(
    "--workdir",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("demo"),
    show_default=True,
    help="Folder for the demo exports, store and outputs.",
)
@log_format_option
@handle_errors
def demo(rows: int, seed: int, workdir: Path, log_format: str) -> None:
    """Generate invented demo exports and run the whole pipeline on them.

    The data describes an invented hospital; no real patient is in it. A pseudonym key
    for the demo is created in the work folder.

    \b
    Example:
      abg-audit demo --rows 20000
    """
    from pipeline.config import load_config
    from pipeline.demo import prepare_demo
    from pipeline.detection import detection_tables, format_report, lookalikes_beside, read_truth
    from pipeline.run import run_pipeline
    from pipeline.store import open_store
    from pipeline.summary import print_run_summary

    log = _log(log_format)
    config_path = prepare_demo(workdir, rows=rows, seed=seed, log=log)
    config = load_config(config_path)
    result = run_pipeline(config, log, command="demo", create_key=True)
    _echo_summary(lambda: print_run_summary(result, config))
    truth = workdir / "exports" / "ground_truth.parquet"
    lookalikes = lookalikes_beside(truth)
    con = open_store(config.store_path, read_only=True)
    try:
        tables = detection_tables(con, read_truth(truth), read_truth(lookalikes) if lookalikes else None)
    finally:
        con.close()
    click.echo("\nInjected faults and clinical look-alikes, and what the rules made of them (demo truth files):")
    click.echo(format_report(tables))
    sys.exit(result.exit_code)


@main.command()
@click.option(
    "--config",
    "config_path",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Site configuration naming the store.",
)
@store_option
@click.option("--limit", type=click.IntRange(1, 1000), default=10, show_default=True, help="How many runs to list.")
@handle_errors
def runs(config_path: Path | None, store: Path | None, limit: int) -> None:
    """List recent runs with their outcome and counts, newest first.

    \b
    Example:
      abg-audit runs --config site.toml --limit 5
    """
    from pipeline.config import load_config
    from pipeline.errors import ConfigError
    from pipeline.store import open_store

    if store is None:
        if config_path is None:
            raise ConfigError("give --config or --store")
        store = load_config(config_path).store_path
    con = open_store(store, read_only=True)
    try:
        cursor = con.execute("select * from runs order by started_at desc limit ?", [limit])
        names = [d[0] for d in cursor.description]
        rows = [dict(zip(names, row, strict=True)) for row in cursor.fetchall()]
    finally:
        con.close()
    if not rows:
        click.echo("no runs recorded yet")
    for run in rows:
        click.echo(format_run(run))


def format_run(run: dict[str, Any]) -> str:
    """Two or three lines per run for ``abg-audit runs``; columns a store predates are skipped."""
    code = "" if run.get("exit_code") is None else f" (exit {run['exit_code']})"
    took = "" if run.get("duration_s") is None else f", {run['duration_s']:.1f} s"
    rebuild = " rebuild" if run.get("rebuild") else ""
    started = f"{run['started_at']:%Y-%m-%d %H:%M} UTC"
    lines = [f"{run['run_id']}  {run['command']}{rebuild}  {started}  {run['outcome']}{code}{took}"]
    if run.get("summary"):
        lines.append(f"    {run['summary']}")
    if run.get("error"):
        lines.append(f"    error: {run['error']}")
    if run["outcome"] == "interrupted":
        lines.append("    interrupted (killed or lost power); a later run finished its work")
    if run.get("flags_data_quality") is not None:
        lines.append(
            f"    flags on the samples checked: {run['flags_data_quality']} data quality (for the laboratory to "
            f"review), {run['flags_documentation']} documentation, {run['flags_clinical']} clinical"
        )
    details = []
    if run.get("catalogue_version"):
        details.append(f"rules v{run['catalogue_version']} ({str(run.get('catalogue_sha256'))[:12]})")
    if run.get("code_version"):
        details.append(f"abg-audit {run['code_version']}, DuckDB {run.get('duckdb_version')}")
    if run.get("records_total") is not None:
        details.append(
            f"store: {run['records_total']} records, {run['quarantine_total']} quarantined, {run['flags_total']} flags"
        )
    if details:
        lines.append("    " + "; ".join(details))
    return "\n".join(lines)


@main.command("check-profile", epilog=EXIT_CODES_HELP)
@click.argument("profile_path", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("export_files", nargs=-1, type=click.Path(dir_okay=False, path_type=Path))
@click.option(
    "--config",
    "config_path",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Site configuration whose [contract] thresholds apply (default: the catalogue's).",
)
@handle_errors
def check_profile(profile_path: Path, export_files: tuple[Path, ...], config_path: Path | None) -> None:
    """Check a mapping profile, and try it on export files exactly as a run would load them.

    Each file is loaded into a scratch store held in memory (the site's store is not
    touched, nothing is kept): the same checks as a run (dialect, columns, codes, dates and
    time zone, unit sanity, the batch contract, quarantine, duplicates), with the same
    messages. A unit declared wrongly (kPa declared as mmHg, FiO2 in percent declared as a
    fraction) rejects the file here as it would on the first night. Pseudonyms are made with
    a throwaway key; no identifier or value is printed. Exits 65 when a file would be
    rejected, 66 when a file does not exist.

    \b
    Example:
      abg-audit check-profile profiles/demo_us_style.toml exports/2026-11-30.csv
    """
    from pipeline.config import load_config
    from pipeline.errors import NoInputError
    from pipeline.preflight import try_profile
    from pipeline.profile import load_profile

    contract = load_config(config_path).contract if config_path else None
    profile = load_profile(profile_path)
    click.echo(
        f"profile {profile.name}: {len(profile.columns)} columns mapped, format {profile.format}, "
        f"delimiter {profile.delimiter!r}, decimal mark {profile.decimal_mark!r}, "
        f"encoding {profile.encoding}, time zone {profile.timezone}"
    )
    missing = [path for path in export_files if not path.is_file()]
    failed = False
    for trial in try_profile(profile, [path for path in export_files if path.is_file()], contract):
        f = trial.outcome
        if f.outcome == "rejected":
            click.echo(f"  {f.path.name}: would be REJECTED ({f.reason_code}): {f.message}")
            failed = True
            continue
        if f.outcome == "already_loaded":
            click.echo(f"  {f.path.name}: same content as a file given before it; a run would skip it")
            continue
        click.echo(
            f"  {f.path.name}: {f.rows_in} rows in = {f.rows_loaded} would load + {f.rows_quarantined} quarantined + "
            f"{f.rows_duplicate} duplicates + {f.rows_superseded_in_file} superseded in file"
        )
        if trial.quarantine_reasons:
            reasons = ", ".join(f"{code} {count}" for code, count in trial.quarantine_reasons.items())
            click.echo(f"    quarantine reasons: {reasons}")
        for warning in trial.contract_warnings:
            click.echo(f"    contract warning: {warning}")
        for note in f.notes:
            click.echo(f"    note: {note}")
    if missing:
        raise NoInputError(f"no such export file: {', '.join(str(path) for path in missing)}")
    sys.exit(65 if failed else 0)


@main.command(epilog=RUN_EPILOG)
@config_option
@click.argument("export_files", nargs=-1, type=click.Path(dir_okay=False, path_type=Path))
@click.option(
    "--profile",
    "profile_name",
    help="Read again every file in the store loaded with this profile (its [profile] name).",
)
@click.option(
    "--reason",
    help="Why, in words (e.g. 'time zone was UTC, is Europe/London'); kept with every earlier version replaced.",
)
@store_option
@output_option
@log_format_option
@handle_errors
def reload(
    config_path: Path,
    export_files: tuple[Path, ...],
    profile_name: str | None,
    reason: str | None,
    store: Path | None,
    output: Path | None,
    log_format: str,
) -> None:
    """Read files the store already holds again with the current version of their profile.

    After fixing a profile (a wrong time zone, a unit declared wrongly) the files it loaded
    are still recognised by their content and never read again by a run. This command reads
    the given EXPORT_FILES (each must be in the store), or with --profile every file loaded
    with that profile, using the profile the site configuration names now, and replaces what
    each file loaded, one transaction per file: a record whose values change keeps its
    earlier version in superseded_records with the reason; a record the re-read no longer
    holds (its row is quarantined now) leaves records the same way, and an earlier delivery's
    version of it from another file becomes current again; a record whose current version
    came later from another file stays as it is (the re-read of it is kept as history).
    Then metrics, flags, audit tables and outputs are brought up to date as in a run
    (runs.command = 'reload'). A file the current profile rejects is left as it was (exit 65).

    \b
    Examples:
      abg-audit reload --config site.toml --profile ward_analysers --reason "time zone fixed"
      abg-audit reload --config site.toml exports/2026-11-30.csv
    """
    from pipeline.config import load_config
    from pipeline.reload import ReloadLoader
    from pipeline.run import run_pipeline
    from pipeline.summary import print_run_summary

    if bool(export_files) == bool(profile_name):
        raise click.UsageError("give either export files or --profile NAME (not both)")
    config = load_config(config_path, store=store, output=output)
    loader = ReloadLoader(config, files=export_files, profile_name=profile_name, operator_reason=reason)
    result = run_pipeline(config, _log(log_format), command="reload", loader=loader)
    _echo_summary(lambda: print_run_summary(result, config))
    sys.exit(result.exit_code)


@main.command("detection-report", epilog=DETECTION_EXIT_CODES_HELP)
@config_option
@click.option(
    "--truth",
    type=click.Path(dir_okay=False, path_type=Path),
    required=True,
    help="Ground-truth file (Parquet or CSV) with sample_id, fault_type, physically_visible.",
)
@click.option(
    "--lookalikes",
    "lookalikes_path",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Look-alike truth file (Parquet or CSV) with sample_id, lookalike_kind "
    "[default: lookalikes.parquet beside --truth, when present].",
)
@handle_errors
def detection_report(config_path: Path, truth: Path, lookalikes_path: Path | None) -> None:
    """Compare the store's flags with the demo's truth files: faults caught, look-alikes spared.

    For each fault type: how many were injected, how many are physically visible, how many
    were caught (a data-quality flag, quarantine, or a merged duplicate). For each kind of
    clinical look-alike (real patients whose physiology looks odd): how many carry a
    data-quality flag and how many were excluded from the oxygenation statistics. And the
    share of clean records with a data-quality flag. Exits 1 when a target is missed: a fault
    type caught in fewer than 95 % of its visible cases, more than 1 % of clean records or
    more than 5 % of a look-alike kind flagged, or any look-alike excluded.

    \b
    Example:
      abg-audit detection-report --config demo/site.toml --truth demo/exports/ground_truth.parquet
    """
    from pipeline.config import load_config
    from pipeline.detection import detection_tables, format_report, lookalikes_beside, missed_targets, read_truth
    from pipeline.errors import NoInputError
    from pipeline.store import open_store

    if not truth.exists():
        raise NoInputError(f"ground-truth file {truth} not found")
    if lookalikes_path is None:
        lookalikes_path = lookalikes_beside(truth)
    elif not lookalikes_path.exists():
        raise NoInputError(f"look-alike file {lookalikes_path} not found")
    config = load_config(config_path)
    con = open_store(config.store_path, read_only=True)
    try:
        tables = detection_tables(con, read_truth(truth), read_truth(lookalikes_path) if lookalikes_path else None)
    finally:
        con.close()
    click.echo(format_report(tables))
    sys.exit(1 if missed_targets(tables) else 0)


@main.command()
@click.option(
    "--config",
    "config_path",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Show the parameters in effect for this site (its [thresholds] overrides applied).",
)
@click.option(
    "--kind",
    type=click.Choice(["data_quality", "documentation", "clinical", "analyser_qc"]),
    help="Only rules of this kind.",
)
@handle_errors
def rules(config_path: Path | None, kind: str | None) -> None:
    """Show the rule catalogue: every check, its kind, severity, rationale, source and parameters.

    \b
    Example:
      abg-audit rules --kind data_quality
    """
    from pipeline.config import load_config
    from pipeline.rules import load_catalogue

    overrides = load_config(config_path).thresholds if config_path else None
    catalogue = load_catalogue(overrides)
    click.echo(f"Rule catalogue version {catalogue.version}")
    for rule in catalogue.rules:
        if kind and rule.kind != kind:
            continue
        excludes = (
            "; a high-severity flag excludes the record from oxygenation statistics"
            if rule.excludes_from_oxygenation
            else ""
        )
        click.echo(f"\n{rule.id}  [{rule.kind}, {rule.severity}{excludes}]\n  {rule.title}")
        click.echo(f"  why: {rule.rationale}")
        click.echo(f"  source: {rule.reference}")
        if rule.parameters:
            click.echo("  parameters: " + ", ".join(f"{k} = {v}" for k, v in rule.parameters.items()))


@main.command()
@handle_errors
def fields() -> None:
    """Print the canonical records: every field of a sample, then of an oxygen prescription
    (the prescriptions feed), with its type and canonical unit."""
    from pipeline.schema import RECORD_SPECS

    for number, spec in enumerate(RECORD_SPECS.values()):
        if number:
            click.echo("")
        click.echo(f"# {spec.kind} ([profile] kind = \"{spec.kind}\"; one record per {spec.key_field})")
        for f in spec.fields:
            unit = f.canonical_unit or ""
            flag = " (required)" if f.required else ""
            click.echo(f"{f.name:<28} {f.kind.value:<9} {unit:<8} {f.description}{flag}")


@main.command("publish-lake", epilog=RUN_EPILOG)
@config_option
@store_option
@click.option(
    "--to", "lake", type=click.Path(file_okay=False, path_type=Path), required=True, help="The network lake folder."
)
@click.option("--site-id", help="The site's folder name in the lake (default: from [site] name).")
@handle_errors
def publish_lake(config_path: Path, store: Path | None, lake: Path, site_id: str | None) -> None:
    """Publish the site's pseudonymised records to a network lake (Parquet by site and month).

    Raw identifiers stay at the site; sample and prescription numbers leave as keyed pseudonyms
    (docs/operations.md, "Network operators").

    \b
    Example:
      abg-audit publish-lake --config site.toml --to /mnt/network-lake
    """
    from pipeline.config import load_config
    from pipeline.network.lake import SiteSettings, check_site_id, publish_lake
    from pipeline.network.lake import site_id as make_site_id
    from pipeline.pseudonym import load_key
    from pipeline.store import open_store

    config = load_config(config_path, store=store)
    site = check_site_id(site_id) if site_id else make_site_id(config.site_name)
    key = load_key(config.key_file)
    con = open_store(config.store_path, read_only=True)
    try:
        manifest = publish_lake(con, SiteSettings.of(config, site), key, lake)
    finally:
        con.close()
    rows = ", ".join(f"{table} {entry['rows']}" for table, entry in manifest["tables"].items())
    click.echo(f"site {site}: {len(manifest['files'])} partition files ({rows}); manifest {lake}/manifests/{site}.json")


@main.command(epilog=EXIT_CODES_HELP)
@click.option(
    "--lake", type=click.Path(file_okay=False, exists=True, path_type=Path), required=True, help="The network lake."
)
@click.option(
    "--output", type=click.Path(file_okay=False, path_type=Path), help="Output folder (default: <lake>/network-output)."
)
@click.option("--engine", type=click.Choice(["duckdb", "spark"]), default="duckdb", show_default=True)
@click.option("--master", default="local[*]", show_default=True, help="Spark master URL (spark engine only).")
@click.option(
    "--settings",
    type=click.Path(dir_okay=False, path_type=Path),
    help="A TOML file with the network's [thresholds] and [audit] (as in a site configuration) and "
    "[privacy] small_cell_threshold, the same for every site; default: the catalogue's and the defaults.",
)
@handle_errors
def network(lake: Path, output: Path | None, engine: str, master: str, settings: Path | None) -> None:
    """Run the derive, rules and audit stages over every site of a network lake.

    Writes derived, flags, audit_status, analyser_qc and the audit's unit x period counts (each
    with a site column) as Parquet partitioned by site; under published/, each site's audit
    tables and report as the site publishes them, every site's tables with a site column, and
    network_report.html; and network_run.json. --engine duckdb is the reference; --engine spark
    runs the same SQL files translated for Spark SQL (pip install -e '.[spark]', Java 17).

    \b
    Examples:
      abg-audit network --lake /mnt/network-lake --engine duckdb
      abg-audit network --lake /mnt/network-lake --engine spark --master 'local[*]'
    """
    from pipeline.network.run import run_network

    output = output or lake / "network-output"
    result = run_network(lake, output, engine=engine, master=master, settings=settings)
    click.echo(f"{engine}: {len(result.sites)} sites; " + ", ".join(f"{t} {n}" for t, n in result.rows.items()))
    if result.untranslated:
        click.echo(f"not run on {engine} (no translation): {', '.join(result.untranslated)}", err=True)
    click.echo(f"outputs in {output}; network report {output / 'published' / 'network_report.html'}")


if __name__ == "__main__":
    main()
