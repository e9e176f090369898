-- After the merge, inside the file's transaction: {table} must hold each {key} once. The
-- table has no primary key (sql/schema/10_store.sql); the merge keeps keys unique by
-- anti-join, and this proves it for the keys the file touched before the file commits. The
-- braces are the record kind's names (RecordSpec.sql_names).
-- Grain: one row; extra_rows = rows beyond one per {key} among the file's keys (0 when all
-- is well).
select count(*) - count(distinct r.{key}) as extra_rows
from {table} as r
semi join (select record_id from stage_row_keys where reason_code is null) as f on f.record_id = r.{key};
