-- After the merge, inside the file's transaction: records must hold each sample_id once.
-- records has no primary key (sql/schema/10_store.sql); the merge keeps keys unique by
-- anti-join, and this proves it for the keys the file touched before the file commits.
-- Grain: one row; extra_rows = rows beyond one per sample_id among the file's keys (0 when
-- all is well).
select count(*) - count(distinct r.sample_id) as extra_rows
from records as r
semi join (select record_id from stage_converted where reason_code is null) as f on f.record_id = r.sample_id;
