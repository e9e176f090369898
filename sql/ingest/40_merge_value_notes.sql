-- Stage 3b, samples only: qualified values (">600") and text results ("haemolysed") of the
-- file's new and corrected records, kept beside them in record_value_notes (stage_notes:
-- the Python parser's notes per row). Runs after 40_merge.sql in the same transaction.
-- Parameters: $file_sha256.
insert into record_value_notes by name
select c.sample_id, $file_sha256 as file_sha256, n.field, n.comparator, n.result_status, n.original_text
from stage_notes as n
join stage_rows as c on c.source_row = n.__row
where c.reason_code is null
  and c.source_row not in (select source_row from stage_set_aside)
  and c.source_row not in (select source_row from stage_held where same_values);
