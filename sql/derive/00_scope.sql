-- The samples whose derived metrics, flags and audit status must be (re)computed.
-- Incremental: samples loaded or corrected in this run, plus every sample of the same
-- patients (the delta check compares a sample with its neighbours in time).
-- Rebuild ($rebuild = true): every sample in the store.
create or replace temp table scope_samples as
select sample_id
from records
where $rebuild
   or run_id = $run_id
   or patient_key in (select patient_key from records where run_id = $run_id and patient_key is not null);
