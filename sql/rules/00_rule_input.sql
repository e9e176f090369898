-- Input of every record-level rule: the records in scope with their derived metrics.
-- Grain: one row per sample in scope_samples. A table, not a view: some twenty rules read
-- it, and a view would join the whole records and derived tables again for each of them,
-- so a nightly run would cost in proportion to the store instead of to the new samples.
-- Only the columns some rule's SQL names ({record_columns}, {derived_columns}: filled by
-- pipeline/rules.py rule_input_columns): the table is as wide as the rules need, not as wide
-- as records and derived together, which at a few million rows is the difference between
-- staying in memory and spilling to disk.
create or replace temp table rule_input as
select
    {record_columns},
    {derived_columns},
    coalesce(r.sample_type, 'unknown') in ('arterial', 'unknown') as is_arterial_or_unknown
from records as r
-- derived_batch (sql/derive/10_derived.sql) holds the derived row of every sample in scope and
-- of no other: joining it instead of derived and scope_samples reads one big table, not two.
join derived_batch as d using (sample_id);
