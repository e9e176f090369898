"""Reload: read held export files again with the current version of their profile.

Files are recognised by the SHA-256 of their bytes, so once a site fixes a mistake in a
profile (a wrong time zone, a unit declared wrongly) the files it already loaded are
"already loaded" and a run never reads them again. ``abg-audit reload`` does: each named
file (or every held file loaded with a profile) is read by the ingest stage
(``pipeline.ingest.load.ingest_file``) with the profile the site configuration names now,
and what the file loaded before is replaced in the same transaction (one per file):

- each record the file loaded that the re-read holds with other values: the earlier version
  goes to ``superseded_records`` (or ``superseded_prescriptions``) with the reason, the
  re-read becomes version + 1; with the same values it stays as it was;
- each record the re-read no longer holds (its row is quarantined now, for example a local
  time the corrected zone does not have): the earlier version goes to the superseded table
  with the reason and the quarantine reason; if another file delivered that record before,
  that delivery's latest version is current again;
- the file's quarantined rows, duplicates, value notes and ledger entry are those of the
  re-read; the ledger keeps the file's first ``loaded_at`` and records the new profile hash,
  ``reloaded_at`` and ``reload_reason``.

- a record the file delivered whose current version a file loaded after it holds stays as it
  is (a later delivery wins, as it did); the re-read of it is kept as history in the
  superseded table when it differs from the file's earlier reading.

Files are read again in the order they were first loaded. A file whose content or profile
now fails (rejected) is left as it was.
The run that does this is an ordinary run (``runs.command = 'reload'``) that then analyses,
audits and writes the outputs (``pipeline.run.run_pipeline`` with a loader).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import duckdb

from pipeline.config import SiteConfig
from pipeline.errors import ConfigError, FileRejected, NoInputError, NotHeldError
from pipeline.ingest.load import FileOutcome, file_sha256, ingest_file
from pipeline.log import Log
from pipeline.profile import Profile
from pipeline.schema import RecordSpec
from pipeline.sql_files import read_sql

REASON = "reloaded after profile change"


@dataclass(frozen=True)
class HeldFile:
    """One ledger entry to read again: where the file is now and the profile to read it with."""

    sha256: str
    path: Path
    profile: Profile
    loaded_at: datetime
    recorded_profile_sha256: str | None

    def reason(self, operator_reason: str | None) -> str:
        """The reason kept with every earlier version the reload supersedes."""
        old = (self.recorded_profile_sha256 or "unrecorded")[:12]
        text = f"{REASON} ({self.profile.name} {old} -> {self.profile.sha256[:12]})"
        return f"{text}: {operator_reason}" if operator_reason else text


def _sql(name: str, record: RecordSpec) -> str:
    """A reload SQL file with the record kind's tables and key filled in (trusted names from
    ``pipeline.schema``, never input)."""
    return read_sql(name).format(table=record.table, superseded_table=record.superseded_table, key=record.key_field)


def _execute(con: duckdb.DuckDBPyConnection, sql: str, **params: object) -> None:
    for statement in con.extract_statements(sql):
        used = statement.named_parameters
        if used:
            con.execute(statement.query, {name: params[name] for name in used})
        else:
            con.execute(statement.query)


# --------------------------------------------------------------------------------------
# Files read with an older version of their profile
# --------------------------------------------------------------------------------------


def outdated_files(con: duckdb.DuckDBPyConnection, config: SiteConfig) -> dict[str, int]:
    """Profile name -> number of held files loaded with another version of it (same name,
    different hash) than the one the site configuration names now. Files loaded before the
    hash was recorded (NULL) are not counted: nothing says they differ."""
    current = {source.profile.name: source.profile.sha256 for source in config.inputs}
    counts = {}
    for name, sha256 in sorted(current.items()):
        found = con.execute(
            "select count(*) from ingested_files where profile = ? and profile_sha256 is not null "
            "and profile_sha256 <> ?",
            [name, sha256],
        ).fetchall()[0][0]
        if found:
            counts[name] = found
    return counts


def warn_outdated(con: duckdb.DuckDBPyConnection, config: SiteConfig, log: Log) -> int:
    """Warn once per profile whose older version loaded files still in the store; return the count."""
    counts = outdated_files(con, config)
    where = f" --config {config.path}" if config.path else ""
    for name, count in counts.items():
        log.warning(
            f"{count} file(s) in the store were loaded with an earlier version of profile {name!r}; their records "
            f"follow the old profile. To read them again with the current one: "
            f"abg-audit reload{where} --profile {name} --reason 'what was fixed'",
            reason="PROFILE_CHANGED",
            profile=name,
            files=count,
        )
    return sum(counts.values())


# --------------------------------------------------------------------------------------
# Planning: which ledger entries to read again, in which order
# --------------------------------------------------------------------------------------


@dataclass
class ReloadLoader:
    """Loads files for ``pipeline.run.run_pipeline`` in place of the configured inputs.

    ``files`` are export files to read again (each must be held, by content); ``profile_name``
    names a profile whose every held file is read again. Exactly one of them is given."""

    config: SiteConfig
    files: Sequence[Path] = ()
    profile_name: str | None = None
    operator_reason: str | None = None
    missing: list[str] = field(default_factory=list)
    planned: list[HeldFile] = field(default_factory=list)

    def _profile(self, name: str) -> Profile:
        for source in self.config.inputs:
            if source.profile.name == name:
                return source.profile
        known = ", ".join(sorted({s.profile.name for s in self.config.inputs}))
        raise ConfigError(
            f"profile {name!r} is not the profile of any [[inputs]] in {self.config.path}; known: {known}"
        )

    def prepare(self, con: duckdb.DuckDBPyConnection) -> int:
        """Plan from the ledger (before anything is written); return the bytes to be read."""
        columns = "file_sha256, source_path, profile, loaded_at, profile_sha256"
        if self.profile_name is not None:
            self._profile(self.profile_name)
            rows = con.execute(
                f"select {columns} from ingested_files where profile = ? order by loaded_at",
                [self.profile_name],
            ).fetchall()
            if not rows:
                raise ConfigError(f"no file in the store was loaded with profile {self.profile_name!r}")
            entries = {row[0]: (row, Path(row[1])) for row in rows}
        else:
            entries = {}
            for path in self.files:
                if not path.is_file():
                    self.missing.append(str(path))
                    continue
                sha256 = file_sha256(path)
                row = con.execute(f"select {columns} from ingested_files where file_sha256 = ?", [sha256]).fetchall()
                if not row:
                    raise NotHeldError(
                        f"{path.name} is not in the store: no loaded file has its content (never loaded, or "
                        "changed since); `abg-audit run` loads new files"
                    )
                entries[sha256] = (row[0], path)
        for (sha256, _source_path, name, loaded_at, recorded), path in sorted(
            entries.values(), key=lambda item: (item[0][3], item[0][0])
        ):
            if not path.is_file():
                self.missing.append(str(path))
                continue
            self.planned.append(HeldFile(sha256, path, self._profile(name), loaded_at, recorded))
        if not self.planned:
            raise NoInputError(f"no file to read again: {', '.join(self.missing)} not found")
        return sum(held.path.stat().st_size for held in self.planned)

    def load(self, con: duckdb.DuckDBPyConnection, key: bytes, run_id: str, log: Log) -> Iterator[FileOutcome]:
        """Read each planned file again, one transaction each; yield its outcome."""
        for number, held in enumerate(self.planned, start=1):
            log.progress(f"[{number}/{len(self.planned)}] reloading {held.path.name}")
            replacement = Replacement(held, run_id, held.reason(self.operator_reason))
            outcome = ingest_file(
                con,
                held.path,
                held.profile,
                run_id,
                key,
                keep_patient_id=self.config.keep_patient_id,
                replacing=replacement,
                contract_settings=self.config.contract,
            )
            if outcome.outcome == "loaded":
                counts = replacement.counts
                log.info(
                    f"{held.path.name}: read again with profile {held.profile.name} "
                    f"({held.profile.sha256[:12]}): {counts.get('changed', 0)} records changed, "
                    f"{counts.get('unchanged', 0)} unchanged, {counts.get('gone', 0)} no longer records "
                    f"({counts.get('restored', 0)} of them back to an earlier delivery's version), "
                    f"{counts.get('later', 0)} held by a later delivery and left as they were",
                    file=held.path.name,
                    **{f"records_{name}": value for name, value in counts.items()},
                )
            yield outcome


# --------------------------------------------------------------------------------------
# Replacing what one file loaded, inside its transaction
# --------------------------------------------------------------------------------------


class Replacement:
    """The ``replacing`` hook of ``ingest_file`` for one held file: ``before_merge`` takes out
    what the file loaded and sets aside the records later deliveries hold (10_retire.sql),
    ``after_merge`` keeps the earlier versions with the reason, settles the records the
    re-read no longer holds and puts the later deliveries back (20_settle.sql). Both run
    inside the file's transaction, so a failure leaves the file as it was."""

    def __init__(self, held: HeldFile, run_id: str, reason: str) -> None:
        self.held = held
        self.run_id = run_id
        self.reason = reason
        self.counts: dict[str, int] = {}

    def before_merge(self, con: duckdb.DuckDBPyConnection, outcome: FileOutcome) -> None:
        if outcome.sha256 != self.held.sha256:
            raise FileRejected(
                "FILE_CHANGED",
                f"{self.held.path.name}: its content changed since it was loaded; not read again "
                "(a run loads the new content as a new file)",
            )
        _execute(con, _sql("reload/10_retire.sql", self.held.profile.record), file_sha256=self.held.sha256)

    def after_merge(self, con: duckdb.DuckDBPyConnection, outcome: FileOutcome) -> None:
        _execute(
            con,
            _sql("reload/20_settle.sql", self.held.profile.record),
            file_sha256=self.held.sha256,
            source_file=str(outcome.path),
            run_id=self.run_id,
            reason=self.reason,
        )
        self.counts = dict(con.execute("select outcome, count(*) from reload_outcomes group by all").fetchall())
        self.counts["restored"] = con.execute("select count(*) from reload_restored").fetchall()[0][0]
        self.counts["later"] = con.execute("select count(*) from reload_later").fetchall()[0][0]
        for table in ("reload_previous", "reload_ledger", "reload_later", "reload_outcomes", "reload_restored"):
            con.execute(f"drop table if exists {table}")
