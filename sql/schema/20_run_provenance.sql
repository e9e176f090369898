-- Provenance of each run beyond the first columns of `runs`, and the fingerprints that let
-- a nightly run skip unchanged files without reading them. Idempotent: ADD COLUMN IF NOT
-- EXISTS upgrades a store made by an earlier version in place.
-- runs.outcome: running, succeeded, completed_with_rejections (exit 65), no_input (66),
-- failed (the exit code and error are kept), interrupted (killed; marked by the next run).

alter table runs add column if not exists rebuild boolean;
alter table runs add column if not exists python_version varchar;
alter table runs add column if not exists pyarrow_version varchar;
alter table runs add column if not exists catalogue_version varchar;
alter table runs add column if not exists catalogue_sha256 varchar;   -- catalogue file + effective parameters
alter table runs add column if not exists pseudonym_key_id varchar;   -- fingerprint of the key, never the key
alter table runs add column if not exists duration_s double;
alter table runs add column if not exists samples_in_scope bigint;    -- samples re-derived and re-checked
alter table runs add column if not exists flags_written bigint;       -- flag rows written for those samples
alter table runs add column if not exists samples_flagged bigint;     -- of those samples, how many have a flag
alter table runs add column if not exists records_total bigint;       -- store totals at the end of the run
alter table runs add column if not exists quarantine_total bigint;
alter table runs add column if not exists flags_total bigint;
alter table runs add column if not exists error varchar;              -- failed runs: the error, no patient data

-- Size and modification time of each input path when its content hash was last checked.
-- A file whose size and mtime are unchanged and whose hash is in the ledger is skipped
-- without being read; `abg-audit run --rebuild` reads and hashes every file again.
create table if not exists file_fingerprints (
    source_path varchar,
    size_bytes bigint,
    mtime_ns bigint,
    file_sha256 varchar,
    checked_at timestamp
);

-- Set in the same transaction as the derived metrics and flags of a run's samples, for
-- that run and for any earlier run killed before its analysis committed (whose samples it
-- picked up). Runs recorded before this column existed finished their analysis.
alter table runs add column if not exists analysed_at timestamp;
alter table runs add column if not exists analysis_sha256 varchar;   -- catalogue + site parameters of the analysis
update runs set analysed_at = finished_at
where analysed_at is null and outcome in ('succeeded', 'completed_with_rejections');

-- Flags written for the samples a run checked, by kind (they add up to flags_written), so a
-- run's data-quality findings for the laboratory are not mixed with clinical findings about
-- patients. Filled at the end of the run; NULL for runs recorded before these columns.
alter table runs add column if not exists flags_data_quality bigint;
alter table runs add column if not exists flags_documentation bigint;
alter table runs add column if not exists flags_clinical bigint;
