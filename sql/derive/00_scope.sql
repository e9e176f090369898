-- The samples whose derived metrics, flags and audit status must be (re)computed.
-- Incremental: samples loaded or corrected by this run - or by an earlier run that was
-- killed before its analysis committed (runs.analysed_at still NULL) - plus every sample
-- of the same patients (the delta check compares a sample with its neighbours in time), and
-- every sample of the patients whose oxygen prescriptions this run loaded or corrected (the
-- prescription linked to a sample may change). The first delivery of a prescriptions feed
-- puts every sample in scope: from then on a sample with no active prescription counts as
-- not prescribed rather than unknown (sql/derive/05_prescription_link.sql).
-- Rebuild ($rebuild = true): every sample in the store.
create or replace temp table scope_runs as
select run_id from runs where analysed_at is null or run_id = $run_id;

create or replace temp table scope_samples as
select sample_id
from records
where $rebuild
   or run_id in (select run_id from scope_runs)
   or patient_key in (
       select patient_key from records
       where run_id in (select run_id from scope_runs) and patient_key is not null
       union all
       select patient_key from prescriptions
       where run_id in (select run_id from scope_runs) and patient_key is not null
       union all
       select patient_key from superseded_prescriptions
       where superseded_in_run in (select run_id from scope_runs) and patient_key is not null
   )
   or (exists (select 1 from prescriptions where run_id in (select run_id from scope_runs))
       and not exists (select 1 from prescriptions where run_id not in (select run_id from scope_runs)));

-- Whether this is a rebuild, for stages that keep their own incremental state
-- (analyser_patient_median_shift keeps its complete blocks) and for those that can recreate a
-- table instead of replacing rows in it. A scope that holds every record (a first load, the
-- first delivery of a prescriptions feed) is a rebuild too: the result is the same, and
-- recreating costs a fraction of deleting and re-inserting every row.
create or replace temp table scope_settings as
select $rebuild::boolean
       or (select count(*) from scope_samples) = (select count(*) from records) as rebuild;
