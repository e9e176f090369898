-- Delta check on haemoglobin and sodium against the same patient's previous and next
-- samples within the window. A jump away and back is flagged; a lasting change is not.
-- Without a later sample, the one before the previous must agree with the previous, so
-- the sample after a wrong-blood sample (a jump back to normal) is not blamed.
with ordered as (
    select
        sample_id,
        patient_key,
        collected_at,
        hb_g_dl,
        na_mmol_l,
        lag(hb_g_dl) over w as hb_prev,
        lead(hb_g_dl) over w as hb_next,
        lag(na_mmol_l) over w as na_prev,
        lag(hb_g_dl, 2) over w as hb_prev2,
        lag(na_mmol_l, 2) over w as na_prev2,
        epoch(collected_at - lag(collected_at, 2) over w) / 3600.0 as hours_since_prev2,
        lead(na_mmol_l) over w as na_next,
        epoch(collected_at - lag(collected_at) over w) / 3600.0 as hours_since_prev,
        epoch(lead(collected_at) over w - collected_at) / 3600.0 as hours_to_next
    from records
    where patient_key in (select patient_key from records join scope_samples using (sample_id))
      and (hb_g_dl is not null or na_mmol_l is not null)
    window w as (partition by patient_key order by collected_at, sample_id)
),
deltas as (
    select
        *,
        hours_since_prev <= $window_hours as has_prev,
        hours_to_next <= $window_hours as has_next,
        -- A jump against one neighbour: beyond the limit. Against both: beyond it on each side, same direction.
        abs(hb_g_dl - hb_prev) > $hb_delta_g_dl as hb_jump_prev,
        abs(hb_g_dl - hb_next) > $hb_delta_g_dl and sign(hb_g_dl - hb_next) = sign(hb_g_dl - hb_prev) as hb_jump_back,
        abs(na_mmol_l - na_prev) > $na_delta_mmol_l as na_jump_prev,
        abs(na_mmol_l - na_next) > $na_delta_mmol_l
            and sign(na_mmol_l - na_next) = sign(na_mmol_l - na_prev) as na_jump_back,
        -- the previous sample is itself out of line with the one before it
        hours_since_prev2 <= $window_hours and abs(hb_prev - hb_prev2) > $hb_delta_g_dl as hb_prev_odd,
        hours_since_prev2 <= $window_hours and abs(na_prev - na_prev2) > $na_delta_mmol_l as na_prev_odd
    from ordered
),
judged as (
    select
        *,
        has_prev and coalesce(hb_jump_prev, false)
            and (coalesce(hb_jump_back, false) or (not coalesce(has_next, false) and not coalesce(hb_prev_odd, false)))
            as hb_flag,
        has_prev and coalesce(na_jump_prev, false)
            and (coalesce(na_jump_back, false) or (not coalesce(has_next, false) and not coalesce(na_prev_odd, false)))
            as na_flag
    from deltas
)
select
    sample_id,
    case when coalesce(has_next, false) then 'high' else 'medium' end as severity,
    trim(concat_ws('; ',
        case when hb_flag then printf('Hb %.1f g/dL against %.1f g/dL %.0f h earlier%s', hb_g_dl, hb_prev,
            hours_since_prev, case when has_next then printf(' and %.1f g/dL %.0f h later', hb_next, hours_to_next) else '' end) end,
        case when na_flag then printf('Na %.0f mmol/L against %.0f mmol/L %.0f h earlier%s', na_mmol_l, na_prev,
            hours_since_prev, case when has_next then printf(' and %.0f mmol/L %.0f h later', na_next, hours_to_next) else '' end) end
    )) || ' in the same patient' as message,
    json_object('hb_g_dl', hb_g_dl, 'hb_previous', hb_prev, 'hb_next', hb_next, 'na_mmol_l', na_mmol_l,
                'na_previous', na_prev, 'na_next', na_next, 'hours_since_previous', round(hours_since_prev, 1),
                'hours_to_next', round(hours_to_next, 1)) as evidence
from judged
where (hb_flag or na_flag)
  and sample_id in (select sample_id from scope_samples);
