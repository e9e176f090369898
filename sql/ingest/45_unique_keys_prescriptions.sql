-- After the merge of a prescriptions file (see 45_unique_keys.sql): prescriptions must
-- hold each prescription_id once among the keys the file touched.
-- Grain: one row; extra_rows = rows beyond one per prescription_id (0 when all is well).
select count(*) - count(distinct p.prescription_id) as extra_rows
from prescriptions as p
semi join (select record_id from stage_converted where reason_code is null) as f on f.record_id = p.prescription_id;
