-- Stage 2: each row of the file becomes exactly one of: quarantined (a cell failed to
-- parse, a required field is missing, a value is outside the hard limits of field_limits,
-- or another row check of the kind failed; reason_code from stage 1), a duplicate, an earlier version superseded
-- within the file, or the record to keep for its key (the last row of the file wins).
-- record_id is the key of every record kind (sample_id, prescription_id), named so by the
-- kind's stage 1 SQL, so this stage is the same for samples and prescriptions.
-- Keeping is the rule and the rest are few, so only the rest are collected, in
-- stage_set_aside; every row of stage_converted not in it is kept.
-- Grain: stage_repeats one row per record_id delivered more than once (rows that parsed);
-- stage_set_aside one row per data record that is not kept, with its outcome.
create or replace temp table stage_repeats as
with candidates as (
    -- hashes seen more than once: every repeated record_id, and the odd collision
    select hash(record_id) as sample_hash
    from stage_converted
    where reason_code is null
    group by sample_hash
    having count(*) > 1
),
repeated as (
    select record_id
    from stage_converted
    where reason_code is null
      and hash(record_id) in (select sample_hash from candidates)
    group by record_id
    having count(*) > 1
)
select
    record_id,
    max(source_row) as kept_row,
    arg_max(content_hash, source_row) as kept_hash
from stage_converted
where reason_code is null
  and record_id in (select record_id from repeated)
group by record_id;

-- Narrow (the row, its key, its reason and its outcome): at a few million rows a copy of
-- every column of the set-aside rows read the whole wide stage twice; the one statement
-- that needs their values (earlier versions superseded within the file, 40_merge.sql)
-- joins them back.
create or replace temp table stage_set_aside as
select source_row, record_id, reason_code, failed_columns, 'quarantined' as outcome, null::bigint as kept_row
from stage_converted
where reason_code is not null
union all
select
    c.source_row,
    c.record_id,
    c.reason_code,
    c.failed_columns,
    case when c.content_hash = r.kept_hash then 'duplicate' else 'superseded_in_file' end as outcome,
    r.kept_row
from stage_converted as c
join stage_repeats as r using (record_id)
where c.reason_code is null
  and c.source_row <> r.kept_row;
