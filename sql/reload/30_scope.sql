-- Samples a reload took out of records (sql/reload/20_settle.sql: "gone") are the only change
-- derive/00_scope.sql cannot see, since it reads records: add them to scope_samples so their
-- derived metrics, flags and audit status are removed, together with every sample of the same
-- patients (the delta checks compare a sample with its neighbours). Read right after
-- 00_scope.sql; for a run that reloaded nothing it adds nothing (every other sample whose
-- version a reload superseded is held with this run's run_id, so already in scope).
insert into scope_samples
select sample_id
from (
    select sample_id
    from superseded_records
    where superseded_in_run in (select run_id from scope_runs)
      and superseded_reason is not null
    union
    select sample_id
    from records
    where patient_key in (
        select patient_key
        from superseded_records
        where superseded_in_run in (select run_id from scope_runs)
          and superseded_reason is not null
          and patient_key is not null
    )
)
except
select sample_id from scope_samples;
