-- Files that must be read again with a reload because they hold the current version of a
-- record that a file being reloaded also delivered, and were loaded after it: re-read alone,
-- the earlier file would overwrite the later delivery. Input: temp table reload_set
-- (file_sha256) of the files planned so far. Grain: one row per such file.
-- {table}, {superseded_table} and {key} are the record kind's tables and key
-- (pipeline/schema.py RecordSpec), filled in by pipeline/reload.py.
with planned as (
    select file_sha256, loaded_at
    from ingested_files
    where file_sha256 in (select file_sha256 from reload_set)
),
delivered as (
    -- records a planned file delivered whose current version is another file's: its versions
    -- replaced later, and its rows merged as duplicates of a record held then
    select {key} as record_key, file_sha256
    from {superseded_table}
    where file_sha256 in (select file_sha256 from planned) and version >= 1
    union
    select coalesce(record_id, sample_id), file_sha256
    from merged_duplicates
    where file_sha256 in (select file_sha256 from planned)
)
select distinct held.file_sha256
from delivered as d
join planned as p using (file_sha256)
join {table} as held on held.{key} = d.record_key
join ingested_files as later on later.file_sha256 = held.file_sha256
where held.file_sha256 not in (select file_sha256 from reload_set)
  and later.loaded_at > p.loaded_at;
