-- Incremental update of the audit's persistent aggregate layer: only the samples whose
-- derived metrics, flags and audit status this run recomputed (scope_samples) can change
-- their facts, so only they are looked at.
create or replace temp table audit_layer_scope as
select sample_id from scope_samples;
