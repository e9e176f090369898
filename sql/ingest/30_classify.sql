-- Stage 2: each row of the file becomes exactly one of: quarantined (a cell failed to
-- parse, a required field is missing, a value is outside the hard limits of field_limits,
-- or another row check of the kind failed; reason_code from stage 1), a duplicate, an earlier version superseded
-- within the file, or the record to keep for its key (the last row of the file wins).
-- record_id is the key of every record kind (sample_id, prescription_id), named so by the
-- kind's stage 1 SQL, so this stage is the same for samples and prescriptions.
-- Keeping is the rule and the rest are few, so only the rest are collected, in
-- stage_set_aside; every row of stage_rows not in it is kept.
-- Keys and reasons come from stage_row_keys (12_stage_rows.sql); content hashes from
-- stage_converted, for the rows of repeated keys only (DuckDB runs the semi join to them
-- before the key joins of that view).
-- Runs before the file's transaction (it reads the file's stage only), so its temp tables
-- can spill under the memory limit however many rows a file repeats.
-- Grain: stage_repeated_rows one row per parsed row whose record_id is delivered more than
-- once; stage_repeats one row per such record_id; stage_set_aside one row per data record
-- that is not kept, with its outcome.
create or replace temp table stage_repeated_rows as
with candidates as (
    -- hashes seen more than once: every repeated record_id, and the odd collision
    select hash(record_id) as sample_hash
    from stage_row_keys
    where reason_code is null
    group by sample_hash
    having count(*) > 1
),
repeated as (
    select record_id
    from stage_row_keys
    where reason_code is null
      and hash(record_id) in (select sample_hash from candidates)
    group by record_id
    having count(*) > 1
)
-- Every column: the earlier versions superseded within the file are stored from here
-- (40_merge.sql), so the wide stage is read once for them.
select *
from stage_converted
where reason_code is null
  and record_id in (select record_id from repeated);

create or replace temp table stage_repeats as
select
    record_id,
    max(source_row) as kept_row,
    arg_max(content_hash, source_row) as kept_hash
from stage_repeated_rows
group by record_id;

-- Narrow (the row, its key, its reason and its outcome): the one statement that needs the
-- values of set-aside rows (earlier versions superseded within the file, 40_merge.sql)
-- takes them from stage_repeated_rows.
create or replace temp table stage_set_aside as
select source_row, record_id, reason_code, failed_columns, 'quarantined' as outcome, null::bigint as kept_row
from stage_row_keys
where reason_code is not null
union all
select
    c.source_row,
    c.record_id,
    c.reason_code,
    c.failed_columns,
    case when c.content_hash = r.kept_hash then 'duplicate' else 'superseded_in_file' end as outcome,
    r.kept_row
from stage_repeated_rows as c
join stage_repeats as r using (record_id)
where c.source_row <> r.kept_row;
