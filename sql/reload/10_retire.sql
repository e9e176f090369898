-- Reload, step 1, inside the file's transaction before its re-read is merged: take out of the
-- store what the held file loaded, so the re-read loads as it would have the first time.
-- Parameters: $file_sha256. {table}, {superseded_table} and {key} are the record kind's
-- tables and key (pipeline/schema.py RecordSpec), filled in by pipeline/reload.py.
-- reload_previous: the file's records that are current now, one row per record; step 2
-- (20_settle.sql) compares them with the re-read.
create or replace temp table reload_previous as
select * from {table} where file_sha256 = $file_sha256;

-- The ledger entry as it was: the reload keeps its first loaded_at (delivery order).
create or replace temp table reload_ledger as
select * from ingested_files where file_sha256 = $file_sha256;

-- Records this file delivered whose current version a file loaded after it holds: the
-- re-read must not replace a later delivery. Set aside here, so the merge takes this file's
-- rows of them as new, and put back unchanged by 20_settle.sql. "Delivered": its versions
-- replaced later, its rows merged as duplicates, and its quarantined rows (a row that failed
-- before may parse now).
create or replace temp table reload_later as
select held.*
from {table} as held
join ingested_files as later on later.file_sha256 = held.file_sha256
where held.file_sha256 <> $file_sha256
  and later.loaded_at > (select loaded_at from reload_ledger)
  and held.{key} in (
      select {key} from {superseded_table} where file_sha256 = $file_sha256 and version >= 1
      union
      select coalesce(record_id, sample_id) from merged_duplicates where file_sha256 = $file_sha256
      union
      select record_id from quarantine where file_sha256 = $file_sha256 and record_id is not null
  );

delete from {table} where file_sha256 = $file_sha256;
delete from {table} where {key} in (select {key} from reload_later);

-- What the re-read writes again: the file's quarantined rows, its duplicates, its value
-- notes, its rows superseded within the file (version 0) and its ledger entry. Its versions
-- that later deliveries replaced (version >= 1) stay: they are history.
delete from quarantine where file_sha256 = $file_sha256;
delete from merged_duplicates where file_sha256 = $file_sha256;
delete from record_value_notes where file_sha256 = $file_sha256;
delete from {superseded_table} where file_sha256 = $file_sha256 and version = 0;
delete from ingested_files where file_sha256 = $file_sha256;
