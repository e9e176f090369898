-- Stage 2: each row of the file becomes exactly one of: quarantined (a cell failed to
-- parse, a required field is missing, or a value is outside the hard limits of
-- field_limits), a duplicate, an earlier version superseded within the file, or the
-- record to keep for its sample_id (the last row of the file wins).
-- Grain: one row per data record of the file, with its outcome.
create or replace temp table stage_checked as
with numeric_values as (
    unpivot (
        select source_row, age_years, o2_flow_l_min, fio2, barometric_pressure_mmhg, temperature_c, ph,
               paco2_mmhg, pao2_mmhg, hco3_mmol_l, base_excess_mmol_l, sao2_pct, spo2_pct, hb_g_dl,
               na_mmol_l, k_mmol_l, cl_mmol_l, lactate_mmol_l, mean_airway_pressure_cmh2o, peep_cmh2o
        from stage_converted
        where parse_reason is null
    )
    on columns(* exclude (source_row)) into name field value v
),
limits_failed as (
    select source_row, string_agg(field || ':IMPLAUSIBLE', '; ' order by field) as failed
    from numeric_values
    join field_limits using (field)
    where v < hard_min or v > hard_max
    group by source_row
),
checked as (
    select
        s.*,
        coalesce(s.parse_reason, case when l.failed is not null then 'IMPLAUSIBLE' end) as reason_code,
        coalesce(s.parse_failed, l.failed) as failed_columns,
        hash(s.patient_id, s.unit, s.analyser_id, s.age_years, s.birth_date, s.collected_at, s.resulted_at,
             s.sample_type, s.o2_device, s.o2_flow_l_min, s.fio2, s.barometric_pressure_mmhg, s.temperature_c,
             s.ph, s.paco2_mmhg, s.pao2_mmhg, s.hco3_mmol_l, s.base_excess_mmol_l, s.sao2_pct,
             s.sao2_is_calculated, s.spo2_pct, s.hb_g_dl, s.na_mmol_l, s.k_mmol_l, s.cl_mmol_l,
             s.lactate_mmol_l, s.mean_airway_pressure_cmh2o, s.peep_cmh2o, s.hypercapnic_risk,
             s.result_status) as content_hash
    from stage_converted as s
    left join limits_failed as l using (source_row)
),
ranked as (
    select
        *,
        row_number() over (partition by sample_id order by source_row desc) as rank_in_file,
        first_value(content_hash) over (partition by sample_id order by source_row desc) as kept_hash
    from checked
    where reason_code is null
)
select
    c.*,
    case
        when c.reason_code is not null then 'quarantined'
        when r.rank_in_file = 1 then 'keep'
        when r.content_hash = r.kept_hash then 'duplicate'
        else 'superseded_in_file'
    end as outcome
from checked as c
left join ranked as r using (source_row);
