-- Stage 1b, every record kind: the temp view stage_rows over stage_units (10_convert.sql),
-- the rows of the file that count: every row DuckDB typed and the Python-parsed copy of
-- each unusual one, numbered. It holds the raw identifiers for the key joins of
-- 15_keys_and_hash*.sql only; a reader that needs an identifier reads stage_converted,
-- which nulls them when the site does not keep them. Readers of a few columns (the unit
-- check, the contract) read stage_rows and pay for no key join.
-- stage_row_keys: each row's number, key and reason, the columns the whole-file checks of
-- stages 2 and 3 read (classify, the unique-key proof, reconciliation). A big file's
-- stage_units spills under the memory limit; this narrow copy is read from memory.
-- Grain: one row per data record.
create or replace temp view stage_rows as
select
    -- rows DuckDB read are numbered by their place in stage_units (file order)
    coalesce(source_row, rowid + 1) as source_row,
    * exclude (source_row, __usual, __cells, __nonblank)
from stage_units
where __usual is distinct from false;  -- rows with an unusual cell: their Python-parsed copy counts

create or replace temp table stage_row_keys as
select source_row, record_id, reason_code, failed_columns
from stage_rows;
