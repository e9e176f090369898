-- Stage 3 for an oxygen prescriptions file (the counterpart of 40_merge.sql): merge the
-- file's kept rows into the store, inside the caller's transaction. A prescription already
-- held with the same values is a duplicate (counted, nothing written); with other values it
-- is a correction: the held version moves to superseded_prescriptions and the new one
-- replaces it with version + 1 (the latest delivery wins). Parameters: $run_id,
-- $source_file, $file_sha256.
-- Kept rows: rows of stage_converted that are not in stage_set_aside (stage 2).
-- stage_held: the kept rows whose prescription is already held; 50_counts.sql reads it.
create or replace temp table stage_held as
select
    k.source_row,
    k.prescription_id,
    coalesce(p.content_hash = k.content_hash, false) as same_values,
    p.version as held_version
from stage_converted as k
join prescriptions as p using (prescription_id)
where k.reason_code is null
  and k.source_row not in (select source_row from stage_set_aside);

-- The prescription's own values: every column of prescriptions except the provenance below.
set variable prescription_value_columns = (
    select list(column_name)
    from information_schema.columns
    where table_name = 'prescriptions'
      and table_schema = 'main'
      and column_name not in ('source_file', 'source_row', 'file_sha256', 'run_id', 'version')
);

insert into superseded_prescriptions by name
select
    columns(lambda c: list_contains(getvariable('prescription_value_columns'), c)),
    $source_file as source_file, source_row, $file_sha256 as file_sha256, $run_id as run_id, 0 as version,
    $source_file as superseded_by_file,
    kept_row as superseded_by_row,
    $run_id as superseded_in_run
from stage_set_aside
where outcome = 'superseded_in_file';

insert into superseded_prescriptions by name
select p.*, $source_file as superseded_by_file, h.source_row as superseded_by_row, $run_id as superseded_in_run
from prescriptions as p
join stage_held as h using (prescription_id)
where not h.same_values;

-- A correction replaces the held row: deleted, then inserted (no key to replace against);
-- new prescriptions take the bulk insert (not held: an anti-join against stage_held).
delete from prescriptions where prescription_id in (select prescription_id from stage_held where not same_values);

insert into prescriptions by name
select
    columns(lambda c: list_contains(getvariable('prescription_value_columns'), c)),
    $source_file as source_file, source_row, $file_sha256 as file_sha256, $run_id as run_id, held_version + 1 as version
from (
    select c.*, h.held_version
    from stage_converted as c
    join stage_held as h on h.source_row = c.source_row
    where not h.same_values
);

insert into prescriptions by name
select
    columns(lambda c: list_contains(getvariable('prescription_value_columns'), c)),
    $source_file as source_file, source_row, $file_sha256 as file_sha256, $run_id as run_id, 1 as version
from stage_converted
where reason_code is null
  and source_row not in (select source_row from stage_set_aside)
  and source_row not in (select source_row from stage_held);

insert into merged_duplicates (sample_id, record_id, record_kind, file_sha256, source_row, duplicate_of, run_id)
select null, prescription_id, 'prescription', $file_sha256, source_row, 'row in the same file', $run_id
from stage_set_aside
where outcome = 'duplicate'
union all
select null, prescription_id, 'prescription', $file_sha256, source_row, 'record already held', $run_id
from stage_held
where same_values;
