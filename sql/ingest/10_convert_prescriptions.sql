-- Stage 1 of loading one oxygen prescriptions file (the prescription counterpart of
-- 10_convert.sql, run the same way, into stage_units): canonical units and row checks;
-- pseudonyms and the content hash follow in 15_keys_and_hash_prescriptions.sql.
-- Input: view stage_input (parsed prescriptions, values in the profile's units, per-row
-- unit columns <field>__unit where the profile names one, else NULL; __usual, __cells,
-- __nonblank as in 10_convert.sql).
-- Parameters: $unit_<field> = the unit the profile declares for that field;
-- $target_min_pct, $target_max_pct = the bounds of a prescribed SpO2 target
-- (pipeline/schema.py TARGET_RANGE_PCT).
-- Row checks, after the parse (a parse failure keeps its own reason):
--   TARGET_RANGE_INVALID  a target end outside the bounds, or low >= high (both present);
--   IMPLAUSIBLE           flow or FiO2 outside the hard limits of field_limits;
--   END_BEFORE_START      end_at earlier than start_at (equal loads: a zero-length order).
-- The first failing check in that order is the reason_code; every failing field is in
-- failed_columns as field:REASON.
-- record_id: the row's key under the name every record kind shares (30_classify.sql).
-- Grain: one row per data record of the batch.
with converted as (
    select
        __row as source_row,
        prescription_id,
        prescription_id as record_id,
        patient_id,
        encounter_id,
        unit,
        start_at,
        end_at,
        saturation_to_pct(target_spo2_low_pct, coalesce(target_spo2_low_pct__unit, $unit_target_spo2_low_pct))
            as target_spo2_low_pct,
        saturation_to_pct(target_spo2_high_pct, coalesce(target_spo2_high_pct__unit, $unit_target_spo2_high_pct))
            as target_spo2_high_pct,
        o2_device,
        o2_flow_l_min,
        fio2_to_fraction(fio2, coalesce(fio2__unit, $unit_fio2)) as fio2,
        prescriber_role,
        __reason as parse_reason,
        __failed as parse_failed,
        __usual,
        __cells,
        __nonblank
    from stage_input
),
limits as (
    select
        max(hard_min) filter (where field = 'fio2') as fio2__min,
        max(hard_max) filter (where field = 'fio2') as fio2__max,
        max(hard_min) filter (where field = 'o2_flow_l_min') as o2_flow_l_min__min,
        max(hard_max) filter (where field = 'o2_flow_l_min') as o2_flow_l_min__max
    from field_limits
),
checked as (
    select
        c.*,
        case when c.parse_reason is null then nullif(concat_ws('; ',
            case when c.target_spo2_low_pct < $target_min_pct or c.target_spo2_low_pct > $target_max_pct
                      or c.target_spo2_low_pct >= c.target_spo2_high_pct
                 then 'target_spo2_low_pct:TARGET_RANGE_INVALID' end,
            case when c.target_spo2_high_pct < $target_min_pct or c.target_spo2_high_pct > $target_max_pct
                      or c.target_spo2_low_pct >= c.target_spo2_high_pct
                 then 'target_spo2_high_pct:TARGET_RANGE_INVALID' end
        ), '') end as range_failed,
        case when c.parse_reason is null then nullif(concat_ws('; ',
            case when c.fio2 < l.fio2__min or c.fio2 > l.fio2__max then 'fio2:IMPLAUSIBLE' end,
            case when c.o2_flow_l_min < l.o2_flow_l_min__min or c.o2_flow_l_min > l.o2_flow_l_min__max
                 then 'o2_flow_l_min:IMPLAUSIBLE' end
        ), '') end as limits_failed,
        case when c.parse_reason is null and c.end_at < c.start_at then 'end_at:END_BEFORE_START' end as end_failed
    from converted as c
    cross join limits as l
)
select
    * exclude (range_failed, limits_failed, end_failed, __cells),
    coalesce(
        parse_reason,
        case when range_failed is not null then 'TARGET_RANGE_INVALID' end,
        case when limits_failed is not null then 'IMPLAUSIBLE' end,
        case when end_failed is not null then 'END_BEFORE_START' end
    ) as reason_code,
    coalesce(parse_failed, nullif(concat_ws('; ', range_failed, limits_failed, end_failed), '')) as failed_columns,
    case
        when not __usual or parse_reason is not null or range_failed is not null or limits_failed is not null
             or end_failed is not null
        then __cells
    end as __cells
from checked;
