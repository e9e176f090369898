-- Full rebuild of the audit's persistent aggregate layer: drop it, then 02_audit_layer_update.sql
-- rebuilds it from every record (the update below, with every sample in scope).
-- Used on a rebuild run, when the layer's settings (reporting period, layer SQL) changed, or
-- when a run's analysis was committed without its audit (a run killed in between).
drop table if exists audit_sample_fact;
drop table if exists audit_sample_flag;
drop table if exists audit_unit_period_counts;
drop table if exists audit_unit_period_flags;
drop table if exists audit_unit_period_patients;
drop table if exists audit_unit_period_episodes;
drop table if exists audit_episode;
drop table if exists audit_unit_period_age_bands;
drop table if exists audit_layer_runs;
drop table if exists audit_layer_state;

create or replace temp table audit_layer_scope as
select sample_id from records;
