-- Stage 3: merge the file's kept rows into the store, inside the caller's transaction.
-- A sample already held with the same values is a duplicate (counted, nothing written);
-- with other values it is a correction: the held version moves to superseded_records
-- and the new one replaces it with version + 1. Parameters: $run_id, $source_file,
-- $file_sha256.
create or replace temp table stage_merge as
select
    k.*,
    case
        when r.sample_id is null then 'new'
        when r.content_hash = k.content_hash then 'duplicate'
        else 'correction'
    end as merge_outcome,
    coalesce(r.version, 0) + 1 as version
from stage_checked as k
left join records as r using (sample_id)
where k.outcome = 'keep';

-- Earlier versions superseded inside this file keep their provenance too.
insert into superseded_records by name
select
    sample_id, patient_id, patient_key, unit, analyser_id, age_years, birth_date, collected_at, resulted_at,
    sample_type, o2_device, o2_flow_l_min, fio2, barometric_pressure_mmhg, temperature_c, ph, paco2_mmhg,
    pao2_mmhg, hco3_mmol_l, base_excess_mmol_l, sao2_pct, sao2_is_calculated, spo2_pct, hb_g_dl, na_mmol_l,
    k_mmol_l, cl_mmol_l, lactate_mmol_l, mean_airway_pressure_cmh2o, peep_cmh2o, hypercapnic_risk,
    result_status, content_hash, $source_file as source_file, source_row, $file_sha256 as file_sha256,
    $run_id as run_id, 0 as version,
    $source_file as superseded_by_file,
    (select max(source_row) from stage_checked as k where k.sample_id = s.sample_id and k.outcome = 'keep')
        as superseded_by_row,
    $run_id as superseded_in_run
from stage_checked as s
where s.outcome = 'superseded_in_file';

insert into superseded_records by name
select r.*, $source_file as superseded_by_file, m.source_row as superseded_by_row, $run_id as superseded_in_run
from records as r
join stage_merge as m using (sample_id)
where m.merge_outcome = 'correction';

insert or replace into records by name
select
    sample_id, patient_id, patient_key, unit, analyser_id, age_years, birth_date, collected_at, resulted_at,
    sample_type, o2_device, o2_flow_l_min, fio2, barometric_pressure_mmhg, temperature_c, ph, paco2_mmhg,
    pao2_mmhg, hco3_mmol_l, base_excess_mmol_l, sao2_pct, sao2_is_calculated, spo2_pct, hb_g_dl, na_mmol_l,
    k_mmol_l, cl_mmol_l, lactate_mmol_l, mean_airway_pressure_cmh2o, peep_cmh2o, hypercapnic_risk,
    result_status, content_hash, $source_file as source_file, source_row, $file_sha256 as file_sha256,
    $run_id as run_id, version
from stage_merge
where merge_outcome in ('new', 'correction');

insert into merged_duplicates
select sample_id, $file_sha256, source_row, 'row in the same file', $run_id
from stage_checked
where outcome = 'duplicate'
union all
select sample_id, $file_sha256, source_row, 'record already held', $run_id
from stage_merge
where merge_outcome = 'duplicate';

insert into record_value_notes by name
select m.sample_id, $file_sha256 as file_sha256, n.field, n.comparator, n.result_status, n.original_text
from stage_notes as n
join stage_merge as m on m.source_row = n.__row
where m.merge_outcome in ('new', 'correction');
