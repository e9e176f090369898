-- Input of every record-level rule: the records in scope with their derived metrics.
-- Grain: one row per sample in scope_samples.
create or replace temp view rule_input as
select
    r.*,
    d.* exclude (sample_id),
    coalesce(r.sample_type, 'unknown') in ('arterial', 'unknown') as is_arterial_or_unknown
from records as r
join derived as d using (sample_id)
join scope_samples as s using (sample_id);
