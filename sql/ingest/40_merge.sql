-- Stage 3: merge the file's kept rows into the store, inside the caller's transaction, for
-- either kind of record (pipeline/schema.py RecordSpec): {table} keyed by {key}, earlier
-- versions to {superseded_table}. The braces are the kind's names, filled in by the loader
-- (RecordSpec.sql_names; table names cannot be query parameters).
-- A record already held with the same values is a duplicate (counted, nothing written);
-- with other values it is a correction: the held version moves to the superseded table
-- and the new one replaces it with version + 1 (the latest delivery wins). Parameters:
-- $run_id, $source_file, $file_sha256.
-- Kept rows: rows of stage_converted that are not in stage_set_aside (stage 2).
-- stage_held: the kept rows whose record is already held (few, in a nightly file);
-- 50_counts.sql reads it.

create or replace temp table stage_held as
select
    k.source_row,
    k.record_id,
    k.{key},
    coalesce(r.content_hash = k.content_hash, false) as same_values,
    r.version as held_version
from stage_converted as k
join {table} as r using ({key})
where k.reason_code is null
  and k.source_row not in (select source_row from stage_set_aside);

-- The record's own values: every column of {table} except the provenance set below, named
-- once here so the inserts cannot drift from the table (pipeline/schema.py is its catalogue).
set variable record_value_columns = (
    select list(column_name)
    from information_schema.columns
    where table_name = '{table}'
      and table_schema = 'main'
      and column_name not in ('source_file', 'source_row', 'file_sha256', 'run_id', 'version')
);

-- Earlier versions superseded inside this file keep their provenance too.
insert into {superseded_table} by name
select
    columns(lambda c: list_contains(getvariable('record_value_columns'), c)),
    $source_file as source_file, source_row, $file_sha256 as file_sha256, $run_id as run_id, 0 as version,
    $source_file as superseded_by_file,
    kept_row as superseded_by_row,
    $run_id as superseded_in_run
from (
    select c.*, s.kept_row
    from stage_repeated_rows as c
    join stage_set_aside as s using (source_row)
    where s.outcome = 'superseded_in_file'
);

insert into {superseded_table} by name
select r.*, $source_file as superseded_by_file, h.source_row as superseded_by_row, $run_id as superseded_in_run
from {table} as r
join stage_held as h using ({key})
where not h.same_values;

-- Corrections replace the held row: it is deleted and the new version inserted ({table} has
-- no key to replace against). New records cannot collide with a held one (every kept row
-- whose record is held is in stage_held: an anti-join), so they take the plain, bulk insert.
-- 45_unique_keys.sql checks the outcome before the file commits.
delete from {table} where {key} in (select {key} from stage_held where not same_values);

insert into {table} by name
select
    columns(lambda c: list_contains(getvariable('record_value_columns'), c)),
    $source_file as source_file, source_row, $file_sha256 as file_sha256, $run_id as run_id, held_version + 1 as version
from (
    select c.*, h.held_version
    from stage_converted as c
    join stage_held as h on h.source_row = c.source_row
    where not h.same_values
);

insert into {table} by name
select
    columns(lambda c: list_contains(getvariable('record_value_columns'), c)),
    $source_file as source_file, source_row, $file_sha256 as file_sha256, $run_id as run_id, 1 as version
from stage_converted
where reason_code is null
  and source_row not in (select source_row from stage_set_aside)
  and source_row not in (select source_row from stage_held);

insert into merged_duplicates (sample_id, record_id, record_kind, file_sha256, source_row, duplicate_of, run_id)
select {staged_sample_id}, record_id, '{record_kind}', $file_sha256, source_row, 'row in the same file', $run_id
from stage_set_aside
where outcome = 'duplicate'
union all
select {staged_sample_id}, record_id, '{record_kind}', $file_sha256, source_row, 'record already held', $run_id
from stage_held
where same_values;
