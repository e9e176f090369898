-- Reload, step 2, inside the file's transaction after the re-read was merged and its ledger
-- entry written: keep each earlier version with the reason, number the versions on, and
-- settle the records the re-read no longer holds. Parameters: $file_sha256, $source_file,
-- $run_id, $reason. {table}, {superseded_table} and {key}: see 10_retire.sql.
-- Every record in reload_previous (the file's current records) ends in exactly one of: unchanged (same values: kept as it
-- was, not stored twice), changed (the earlier version to {superseded_table} with the reason,
-- the re-read as version + 1) or gone (no record in the re-read: its row is quarantined now,
-- or no longer in the file; the earlier version to {superseded_table} with the reason, and the
-- version an earlier delivery of another file held, if any, is current again).
create or replace temp table reload_outcomes as
select
    p.{key} as record_key,
    case
        when n.{key} is null then 'gone'
        when n.content_hash is not distinct from p.content_hash then 'unchanged'
        else 'changed'
    end as outcome,
    p.version as previous_version,
    n.source_row as new_row
from reload_previous as p
left join {table} as n on n.{key} = p.{key} and n.file_sha256 = $file_sha256;

insert into {superseded_table} by name
select
    p.*,
    $source_file as superseded_by_file,
    o.new_row as superseded_by_row,
    $run_id as superseded_in_run,
    $reason || case
        when o.outcome = 'gone' then '; not a record in the re-read file'
            || coalesce(' (row ' || q.source_row || ' quarantined: ' || q.reason_code || ')', '')
        else ''
    end as superseded_reason
from reload_previous as p
join reload_outcomes as o on o.record_key = p.{key}
left join (
    select record_id, min(source_row) as source_row, arg_min(reason_code, source_row) as reason_code
    from quarantine
    where file_sha256 = $file_sha256 and record_id is not null
    group by record_id
) as q on q.record_id = p.{key}
where o.outcome in ('changed', 'gone');

update {table} as n
set version = case when o.outcome = 'unchanged' then o.previous_version else o.previous_version + 1 end
from reload_outcomes as o
where n.{key} = o.record_key
  and n.file_sha256 = $file_sha256;

-- A gone record that another file delivered before this one: that delivery's latest version
-- is current again, as if this file had been read with the corrected profile from the start.
create or replace temp table reload_restored as
select * exclude (pick)
from (
    select
        s.*,
        s.rowid as superseded_rowid,
        row_number() over (partition by s.{key} order by s.version desc) as pick
    from {superseded_table} as s
    join reload_outcomes as o on o.record_key = s.{key} and o.outcome = 'gone'
    where s.file_sha256 <> $file_sha256
      and s.version >= 1
)
where pick = 1;

delete from {superseded_table} where rowid in (select superseded_rowid from reload_restored);

insert into {table} by name
select
    r.* exclude (superseded_by_file, superseded_by_row, superseded_in_run, superseded_reason, superseded_rowid,
                 version, run_id),
    o.previous_version + 1 as version,
    $run_id as run_id
from reload_restored as r
join reload_outcomes as o on o.record_key = r.{key};

-- Records a later delivery holds (reload_later, 10_retire.sql): this file's re-read of them is
-- kept as history (superseded by that delivery, with the reason) when it differs from this
-- file's earlier reading, and the later delivery is put back as it was.
insert into {superseded_table} by name
select
    n.* replace (coalesce(e.version, n.version) as version),
    l.source_file as superseded_by_file,
    l.source_row as superseded_by_row,
    $run_id as superseded_in_run,
    $reason as superseded_reason
from {table} as n
join reload_later as l on l.{key} = n.{key}
left join (
    -- this file's latest reading of each (the first load's, or an earlier reload's)
    select {key}, arg_max(content_hash, rowid) as content_hash, max(version) as version
    from {superseded_table}
    where file_sha256 = $file_sha256 and version >= 1
    group by {key}
) as e on e.{key} = n.{key}
where n.file_sha256 = $file_sha256
  and n.content_hash is distinct from e.content_hash;

delete from {table}
where {key} in (select {key} from reload_later)
  and file_sha256 = $file_sha256;

insert into {table} by name
select * from reload_later;

-- Earlier versions of other files that the re-read corrected (the merge moved them): the reason.
update {superseded_table}
set superseded_reason = $reason
where superseded_in_run = $run_id
  and superseded_by_file = $source_file
  and superseded_reason is null
  and version >= 1;

update ingested_files
set loaded_at = coalesce((select loaded_at from reload_ledger), loaded_at),
    reloaded_at = now()::timestamp,
    reload_reason = $reason
where file_sha256 = $file_sha256;
