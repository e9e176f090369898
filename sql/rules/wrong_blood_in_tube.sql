-- Delta check on haemoglobin and sodium against the same patient's neighbouring samples
-- within the window (by collection time). A sample is out of line when:
--   * with samples on both sides: it differs from both in the same direction, by more
--     than the limit from one and more than half the limit from the other (a lasting
--     change such as a transfusion moves the following samples too and is not flagged);
--   * with earlier samples only: it differs from the previous one by more than the limit
--     while the previous one agrees with the sample before it (so the sample that follows a
--     wrong one, returning to the patient's level, is not blamed);
--   * a pair (the patient's only two samples within the window): both are flagged, since
--     nothing says which of the two is the wrong one;
--   * with later samples only (the patient's first sample): it differs from the next one
--     by more than the limit in one analyte and by more than half the limit in the other,
--     while the next two agree. Another patient's blood moves Hb and Na together; bleeding
--     or transfusion moves Hb alone, so a lasting Hb change is not blamed on the first sample.
-- Both-sided findings are high severity, one-sided medium.
with ordered as (
    select
        sample_id,
        patient_key,
        collected_at,
        hb_g_dl,
        na_mmol_l,
        lag(hb_g_dl) over w as hb_prev,
        lag(hb_g_dl, 2) over w as hb_prev2,
        lead(hb_g_dl) over w as hb_next,
        lead(hb_g_dl, 2) over w as hb_next2,
        lag(na_mmol_l) over w as na_prev,
        lag(na_mmol_l, 2) over w as na_prev2,
        lead(na_mmol_l) over w as na_next,
        lead(na_mmol_l, 2) over w as na_next2,
        epoch(collected_at - lag(collected_at) over w) / 3600.0 as hours_since_prev,
        epoch(collected_at - lag(collected_at, 2) over w) / 3600.0 as hours_since_prev2,
        epoch(lead(collected_at) over w - collected_at) / 3600.0 as hours_to_next,
        epoch(lead(collected_at, 2) over w - collected_at) / 3600.0 as hours_to_next2
    from records
    where patient_key in (select patient_key from records join scope_samples using (sample_id))
      and (hb_g_dl is not null or na_mmol_l is not null)
    window w as (partition by patient_key order by collected_at, sample_id)
),
sides as (
    select
        *,
        coalesce(hours_since_prev <= $window_hours, false) as has_prev,
        coalesce(hours_to_next <= $window_hours, false) as has_next,
        coalesce(hours_since_prev2 <= $window_hours, false) as has_prev2,
        coalesce(hours_to_next2 <= $window_hours, false) as has_next2
    from ordered
),
judged as (
    select
        *,
        case
            when has_prev and has_next then
                sign(hb_g_dl - hb_prev) = sign(hb_g_dl - hb_next)
                and least(abs(hb_g_dl - hb_prev), abs(hb_g_dl - hb_next)) > $hb_delta_g_dl / 2
                and greatest(abs(hb_g_dl - hb_prev), abs(hb_g_dl - hb_next)) > $hb_delta_g_dl
            when has_prev then
                abs(hb_g_dl - hb_prev) > $hb_delta_g_dl
                and not (has_prev2 and coalesce(abs(hb_prev - hb_prev2) > $hb_delta_g_dl, false))
            when has_next and not has_next2 then
                abs(hb_g_dl - hb_next) > $hb_delta_g_dl
            when has_next then
                abs(hb_g_dl - hb_next) > $hb_delta_g_dl
                and abs(na_mmol_l - na_next) > $na_delta_mmol_l / 2
                and abs(hb_next - hb_next2) <= $hb_delta_g_dl
        end as hb_flag,
        case
            when has_prev and has_next then
                sign(na_mmol_l - na_prev) = sign(na_mmol_l - na_next)
                and least(abs(na_mmol_l - na_prev), abs(na_mmol_l - na_next)) > $na_delta_mmol_l / 2
                and greatest(abs(na_mmol_l - na_prev), abs(na_mmol_l - na_next)) > $na_delta_mmol_l
            when has_prev then
                abs(na_mmol_l - na_prev) > $na_delta_mmol_l
                and not (has_prev2 and coalesce(abs(na_prev - na_prev2) > $na_delta_mmol_l, false))
            when has_next and not has_next2 then
                abs(na_mmol_l - na_next) > $na_delta_mmol_l
            when has_next then
                abs(na_mmol_l - na_next) > $na_delta_mmol_l
                and abs(hb_g_dl - hb_next) > $hb_delta_g_dl / 2
                and abs(na_next - na_next2) <= $na_delta_mmol_l
        end as na_flag
    from sides
),
described as (
    select
        *,
        case when has_prev then printf(' against %s %.0f h earlier', '{}', hours_since_prev) else '' end as prev_words,
        case when has_next then printf(' and %s %.0f h later', '{}', hours_to_next) else '' end as next_words
    from judged
    where coalesce(hb_flag, false) or coalesce(na_flag, false)
)
select
    sample_id,
    case when has_prev and has_next then 'high' else 'medium' end as severity,
    concat_ws('; ',
        case when hb_flag then printf('Hb %.1f g/dL', hb_g_dl)
            || replace(prev_words, '{}', printf('%.1f g/dL', hb_prev))
            || replace(case when has_prev then next_words else replace(next_words, ' and ', ' against ') end,
                       '{}', printf('%.1f g/dL', hb_next)) end,
        case when na_flag then printf('Na %.0f mmol/L', na_mmol_l)
            || replace(prev_words, '{}', printf('%.0f mmol/L', na_prev))
            || replace(case when has_prev then next_words else replace(next_words, ' and ', ' against ') end,
                       '{}', printf('%.0f mmol/L', na_next)) end
    ) || ' in the same patient'
      || case when not has_prev and has_next and not has_next2
              then ' (only two samples: either may be from another patient)' else '' end as message,
    json_object('hb_g_dl', hb_g_dl, 'hb_previous', hb_prev, 'hb_next', hb_next, 'na_mmol_l', na_mmol_l,
                'na_previous', na_prev, 'na_next', na_next, 'hours_since_previous', round(hours_since_prev, 1),
                'hours_to_next', round(hours_to_next, 1)) as evidence
from described
where sample_id in (select sample_id from scope_samples);
