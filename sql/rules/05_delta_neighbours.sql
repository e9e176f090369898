-- Delta checks, shared by rules wrong_blood_in_tube, diluted_sample and
-- delta_change_clinical_course: each analyte of a sample in scope against the same
-- patient's previous and next results of that analyte within $window_hours (by collection
-- time), and the results one further out on each side.
-- The limit for a difference is delta_check_limit: the reference change value of the analyte
-- (analytical and within-subject CVs) at the neighbour's level, plus the change a treated
-- patient's value can make per hour times the hours between the samples. Parameters are the
-- wrong_blood_in_tube rule's (pipeline/catalogue.toml, with their sources).
-- Stable analyte groups: haemoglobin; sodium and chloride (one group: they move together).
-- Glucose is labile: it never suggests another patient's blood and only shows a dilution by a
-- glucose infusion. Potassium (haemolysis, treatment) is too labile to be compared at all.
-- Grain of delta_values: one row per (sample in scope with some analyte beyond its reference
-- change value from a neighbour within $window_hours, analyte with a value and a result of that
-- analyte before or after it within $window_hours).
create or replace temp table delta_values as
with patients as (
    -- the patients of the samples in scope, from rule_input (00_rule_input.sql: one row per
    -- sample in scope), which is small in a nightly run where records is not
    select distinct patient_key
    from rule_input
    where patient_key is not null
),
analytes as (
    select * from (
        values
            ('hb', $hb_cva_pct, $hb_cvi_pct, $hb_rate_per_hour, $hb_max_change),
            ('na', $na_cva_pct, $na_cvi_pct, $na_rate_per_hour, $na_max_change),
            ('cl', $cl_cva_pct, $cl_cvi_pct, $cl_rate_per_hour, $cl_max_change),
            ('glucose', $glucose_cva_pct, $glucose_cvi_pct, $glucose_rate_per_hour, $glucose_max_change)
    ) as a(analyte, cva, cvi, rate, max_change)
),
-- One pass over each patient's samples in time order (a sort of the records, not of one row per
-- analyte): the neighbours one and two samples away on each side. A neighbour without the
-- analyte leaves that side empty for it.
adjacent as (
    select
        r.sample_id,
        r.hb_g_dl as hb, r.na_mmol_l as na, r.cl_mmol_l as cl, r.glucose_mmol_l as glucose,
        lag(r.hb_g_dl) over w as hb_prev, lag(r.hb_g_dl, 2) over w as hb_prev2,
        lead(r.hb_g_dl) over w as hb_next, lead(r.hb_g_dl, 2) over w as hb_next2,
        lag(r.na_mmol_l) over w as na_prev, lag(r.na_mmol_l, 2) over w as na_prev2,
        lead(r.na_mmol_l) over w as na_next, lead(r.na_mmol_l, 2) over w as na_next2,
        lag(r.cl_mmol_l) over w as cl_prev, lag(r.cl_mmol_l, 2) over w as cl_prev2,
        lead(r.cl_mmol_l) over w as cl_next, lead(r.cl_mmol_l, 2) over w as cl_next2,
        lag(r.glucose_mmol_l) over w as glucose_prev, lag(r.glucose_mmol_l, 2) over w as glucose_prev2,
        lead(r.glucose_mmol_l) over w as glucose_next, lead(r.glucose_mmol_l, 2) over w as glucose_next2,
        epoch(r.collected_at - lag(r.collected_at) over w) / 3600.0 as hours_since_prev,
        epoch(lag(r.collected_at) over w - lag(r.collected_at, 2) over w) / 3600.0 as hours_prev_to_prev2,
        epoch(lead(r.collected_at) over w - r.collected_at) / 3600.0 as hours_to_next,
        epoch(lead(r.collected_at, 2) over w - lead(r.collected_at) over w) / 3600.0 as hours_next_to_next2
    from records as r
    semi join patients as p on p.patient_key = r.patient_key
    where r.collected_at is not null
    window w as (partition by r.patient_key order by r.collected_at, r.sample_id)
),
-- Only a sample with some analyte beyond its reference change value from a neighbour within the
-- window can show a pattern or a change (every limit below is that value plus a time allowance
-- of zero or more, and the dilution test compares with the nearer neighbour's value alone), so
-- only those samples are compared analyte by analyte: about one in three.
neighbours as (
    select * from adjacent
    where (hours_since_prev <= $window_hours
           and (abs(hb - hb_prev) > delta_check_limit(hb_prev, $hb_cva_pct, $hb_cvi_pct, 0.0, 0.0)
                or abs(na - na_prev) > delta_check_limit(na_prev, $na_cva_pct, $na_cvi_pct, 0.0, 0.0)
                or abs(cl - cl_prev) > delta_check_limit(cl_prev, $cl_cva_pct, $cl_cvi_pct, 0.0, 0.0)
                or abs(glucose - glucose_prev)
                   > delta_check_limit(glucose_prev, $glucose_cva_pct, $glucose_cvi_pct, 0.0, 0.0)))
       or (hours_to_next <= $window_hours
           and (abs(hb - hb_next) > delta_check_limit(hb_next, $hb_cva_pct, $hb_cvi_pct, 0.0, 0.0)
                or abs(na - na_next) > delta_check_limit(na_next, $na_cva_pct, $na_cvi_pct, 0.0, 0.0)
                or abs(cl - cl_next) > delta_check_limit(cl_next, $cl_cva_pct, $cl_cvi_pct, 0.0, 0.0)
                or abs(glucose - glucose_next)
                   > delta_check_limit(glucose_next, $glucose_cva_pct, $glucose_cvi_pct, 0.0, 0.0)))
),
-- the samples judged: those in scope (a rebuild judges every one without the join)
judged as (
    select * from neighbours where (select rebuild from scope_settings)
    union all
    select * from neighbours semi join scope_samples using (sample_id) where not (select rebuild from scope_settings)
),
ordered as (
    select sample_id, 'hb' as analyte, hb as value, hb_prev as prev_value, hb_prev2 as prev2_value,
           hb_next as next_value, hb_next2 as next2_value,
           hours_since_prev, hours_prev_to_prev2, hours_to_next, hours_next_to_next2
    from judged where hb is not null
    union all
    select sample_id, 'na', na, na_prev, na_prev2, na_next, na_next2,
           hours_since_prev, hours_prev_to_prev2, hours_to_next, hours_next_to_next2
    from judged where na is not null
    union all
    select sample_id, 'cl', cl, cl_prev, cl_prev2, cl_next, cl_next2,
           hours_since_prev, hours_prev_to_prev2, hours_to_next, hours_next_to_next2
    from judged where cl is not null
    union all
    select sample_id, 'glucose', glucose, glucose_prev, glucose_prev2, glucose_next, glucose_next2,
           hours_since_prev, hours_prev_to_prev2, hours_to_next, hours_next_to_next2
    from judged where glucose is not null
),
windowed as (
    select
        sample_id, analyte, cva, cvi, rate, max_change, value,
        case when hours_since_prev <= $window_hours then prev_value end as prev_value,
        case when hours_since_prev <= $window_hours then hours_since_prev end as hours_since_prev,
        case when hours_to_next <= $window_hours then next_value end as next_value,
        case when hours_to_next <= $window_hours then hours_to_next end as hours_to_next,
        case when hours_since_prev + hours_prev_to_prev2 <= $window_hours then prev2_value end as prev2_value,
        case when hours_since_prev + hours_prev_to_prev2 <= $window_hours then hours_prev_to_prev2 end
            as hours_prev_to_prev2,
        case when hours_to_next + hours_next_to_next2 <= $window_hours then next2_value end as next2_value,
        case when hours_to_next + hours_next_to_next2 <= $window_hours then hours_next_to_next2 end
            as hours_next_to_next2
    from ordered
    join analytes using (analyte)
    -- a result with no neighbour in the window can show no pattern: leaving it out changes no
    -- judgement (every pattern below needs a neighbour) and keeps the table to the comparisons
    where hours_since_prev <= $window_hours or hours_to_next <= $window_hours
),
limits as (
select
    * exclude (cva, cvi, rate, max_change),
    prev_value is not null as has_prev,
    next_value is not null as has_next,
    value - prev_value as change_from_prev,
    value - next_value as change_from_next,
    -- the time allowance grows with the hours between the samples up to max_change (treatment moves
    -- a value so far and no further within the window)
    delta_check_limit(prev_value, cva, cvi, rate, least(hours_since_prev, max_change / rate)) as limit_prev,
    delta_check_limit(next_value, cva, cvi, rate, least(hours_to_next, max_change / rate)) as limit_next,
    delta_check_limit(prev_value, cva, cvi, rate, least(hours_since_prev, hours_to_next, max_change / rate))
        as limit_shorter_prev,
    delta_check_limit(next_value, cva, cvi, rate, least(hours_since_prev, hours_to_next, max_change / rate))
        as limit_shorter_next,
    delta_check_limit(prev_value, cva, cvi, 0.0, 0.0) as rcv_prev,
    delta_check_limit(next_value, cva, cvi, 0.0, 0.0) as rcv_next,
    -- the two neighbours agree: the patient's level before and after is the same, within the
    -- reference change value alone
    abs(next_value - prev_value) <= delta_check_limit(prev_value, cva, cvi, 0.0, 0.0) as neighbours_agree,
    -- the only neighbour is itself in line with the one beyond it (so the sample after a wrong
    -- one, back at the patient's level, is not blamed)
    coalesce(abs(prev_value - prev2_value)
             <= delta_check_limit(prev2_value, cva, cvi, rate, least(hours_prev_to_prev2, max_change / rate)), true)
        as prev_in_line,
    coalesce(abs(next_value - next2_value)
             <= delta_check_limit(next2_value, cva, cvi, rate, least(hours_next_to_next2, max_change / rate)), true)
        as next_in_line
from windowed
)
select
    *,
    -- two-sided: away from both neighbours in the same direction
    coalesce(has_prev and has_next and abs(change_from_prev) > limit_prev and abs(change_from_next) > limit_next
             and sign(change_from_prev) = sign(change_from_next), false) as out_of_line,
    -- away and back: the neighbours agree, so a real change would have had to go and come back; both
    -- legs fit in the shorter of the two intervals at most, so each difference is judged with that
    -- interval's allowance (a value back at the patient's level three minutes later cannot have left
    -- it through a treatment of the fourteen hours before)
    coalesce(has_prev and has_next and neighbours_agree and sign(change_from_prev) = sign(change_from_next)
             and abs(change_from_prev) > limit_shorter_prev and abs(change_from_next) > limit_shorter_next, false)
        as away_and_back,
    -- one-sided: away from the only neighbour, which is in line with its own neighbour
    coalesce(case when has_prev and not has_next then abs(change_from_prev) > limit_prev and prev_in_line
                  when has_next and not has_prev then abs(change_from_next) > limit_next and next_in_line
             end, false) as moved_one_sided,
    -- the nearer neighbour in time, and whether the sample differs from the other one too (same
    -- direction, beyond the reference change value): NULL when there is no other one
    case when has_prev and (not has_next or hours_since_prev <= hours_to_next) then prev_value else next_value end
        as near_value,
    case when has_prev and has_next then
        case when hours_since_prev <= hours_to_next
             then sign(change_from_next) = sign(change_from_prev) and abs(change_from_next) > rcv_next
             else sign(change_from_prev) = sign(change_from_next) and abs(change_from_prev) > rcv_prev end
    end as far_differs_too,
    case when has_prev and (not has_next or hours_since_prev <= hours_to_next) then rcv_prev else rcv_next end
        as near_rcv,
    -- beyond the reference change value alone (no time allowance) from the previous result
    coalesce(abs(change_from_prev) > rcv_prev, false) as changed_from_prev
from limits;

-- Grain of delta_summary and delta_judged: one row per sample in scope with at least one
-- compared analyte; delta_judged adds the patterns the three rules report:
--   dilution_pattern     against the nearer neighbour, Hb down beyond its reference change
--                        value with chloride up (sodium neither down nor up by more than the
--                        share allows) or with glucose up and sodium
--                        down, by a share of flush fluid that agrees within $mixing_tolerance
--                        between the two analytes (mixing with 0.9 % saline, Na and Cl 154 mmol/L,
--                        or 5 % glucose, 278 mmol/L, moves every analyte by the same share); where
--                        the other neighbour exists, Hb must be back up there (a lasting change, as
--                        after saline resuscitation, is not a diluted sample).
--   wrong_blood_severity 'high' when both stable groups (Hb, Na/Cl) are out of line with the
--                        neighbours on both sides, or one stable group jumps away and comes back
--                        to where it was (the neighbours agree; judged with the shorter
--                        interval's allowance, away_and_back); 'medium' when both stable groups
--                        differ from the only neighbour and that neighbour does not itself look
--                        diluted; NULL otherwise, and for a dilution. One
--                        stable analyte changing alone fits a clinical course (transfusion,
--                        bleeding, bypass, sodium correction): never wrong blood on its own.
create or replace temp table delta_summary as
select
    sample_id,
    -- stable groups (haemoglobin; sodium and chloride) out of line, away and back, moved one-sided
    coalesce(bool_or(out_of_line) filter (where analyte = 'hb'), false)::int
        + coalesce(bool_or(out_of_line) filter (where analyte in ('na', 'cl')), false)::int as stable_groups_out_of_line,
    coalesce(bool_or(away_and_back) filter (where analyte = 'hb'), false)::int
        + coalesce(bool_or(away_and_back) filter (where analyte in ('na', 'cl')), false)::int
        as stable_groups_away_and_back,
    coalesce(bool_or(moved_one_sided) filter (where analyte = 'hb'), false)::int
        + coalesce(bool_or(moved_one_sided) filter (where analyte in ('na', 'cl')), false)::int
        as stable_groups_moved_one_sided,
    -- each analyte against its nearer neighbour, with the reference change value at that level
    max(value) filter (where analyte = 'hb') as hb,
    max(near_value) filter (where analyte = 'hb') as hb_near,
    max(near_rcv) filter (where analyte = 'hb') as hb_rcv,
    bool_and(far_differs_too) filter (where analyte = 'hb') as hb_far_differs_too,
    max(value) filter (where analyte = 'na') as na,
    max(near_value) filter (where analyte = 'na') as na_near,
    max(near_rcv) filter (where analyte = 'na') as na_rcv,
    max(value) filter (where analyte = 'cl') as cl,
    max(near_value) filter (where analyte = 'cl') as cl_near,
    max(near_rcv) filter (where analyte = 'cl') as cl_rcv,
    max(value) filter (where analyte = 'glucose') as glucose,
    max(near_value) filter (where analyte = 'glucose') as glucose_near,
    max(near_rcv) filter (where analyte = 'glucose') as glucose_rcv,
    -- a single stable analyte beyond its reference change value since the previous sample
    max(change_from_prev) filter (where analyte = 'hb' and changed_from_prev) as hb_change,
    max(hours_since_prev) filter (where analyte = 'hb' and changed_from_prev) as hb_hours,
    max(change_from_prev) filter (where analyte = 'na' and changed_from_prev) as na_change,
    max(hours_since_prev) filter (where analyte = 'na' and changed_from_prev) as na_hours
from delta_values
group by sample_id;

create or replace temp table delta_judged as
with shares as (
    select
        *,
        -- the share of flush fluid each analyte implies, against the nearer neighbour
        1.0 - hb / nullif(hb_near, 0) as hb_share,
        (cl - cl_near) / nullif(154.0 - cl_near, 0) as saline_share_from_cl,
        (na_near - na) / nullif(na_near, 0) as glucose_share_from_na,
        -- the same shares with the roles turned round: the nearer neighbour looks diluted
        1.0 - hb_near / nullif(hb, 0) as neighbour_hb_share,
        (cl_near - cl) / nullif(154.0 - cl, 0) as neighbour_saline_share_from_cl,
        (na - na_near) / nullif(na, 0) as neighbour_glucose_share_from_na
    from delta_summary
),
patterns as (
    select
        *,
        coalesce(
            hb < hb_near - hb_rcv
            and coalesce(hb_far_differs_too, true)
            and (
                (cl > cl_near + cl_rcv and na >= na_near - na_rcv
                 and na <= na_near + hb_share * (154.0 - na_near) + na_rcv
                 and abs(hb_share - saline_share_from_cl) <= $mixing_tolerance)
                or (glucose > glucose_near + glucose_rcv and na < na_near - na_rcv
                    and abs(hb_share - glucose_share_from_na) <= $mixing_tolerance)
            ), false) as dilution_pattern,
        hb_far_differs_too is not null as dilution_two_sided,
        coalesce(
            hb_near < hb - hb_rcv
            and (
                (cl_near > cl + cl_rcv and na_near >= na - na_rcv
                 and na_near <= na + neighbour_hb_share * (154.0 - na) + na_rcv
                 and abs(neighbour_hb_share - neighbour_saline_share_from_cl) <= $mixing_tolerance)
                or (glucose_near > glucose + glucose_rcv
                    and abs(neighbour_hb_share - neighbour_glucose_share_from_na) <= $mixing_tolerance)
            ), false) as neighbour_looks_diluted
    from shares
)
select
    *,
    case
        when dilution_pattern then null
        when stable_groups_out_of_line >= 2 or stable_groups_away_and_back >= 1 then 'high'
        -- compared with one neighbour only, which itself looks diluted: that one is the odd sample
        when stable_groups_moved_one_sided >= 2 and not neighbour_looks_diluted then 'medium'
    end as wrong_blood_severity
from patterns;

-- The evidence in words and as JSON, for the samples the three rules report only (string work
-- on every analyte of every sample would cost more than the judgement itself). Words name only
-- the neighbours that exist.
-- Grain: one row per sample of delta_judged with a pattern or a clinical-course change.
create or replace temp table delta_evidence as
with labelled as (
    select
        v.*,
        case v.analyte when 'hb' then 'Hb' when 'na' then 'Na' when 'cl' then 'Cl' else v.analyte end
            as label,
        case v.analyte when 'hb' then 'g/dL' else 'mmol/L' end as unit
    from delta_values as v
    semi join delta_judged as j
        on j.sample_id = v.sample_id
       and (j.dilution_pattern or j.wrong_blood_severity is not null or j.hb_change is not null or j.na_change is not null)
),
described as (
    select
        *,
        label || ' ' || printf(case when unit = 'g/dL' then '%.1f %s' else '%.0f %s' end, value, unit)
            || coalesce(printf(case when unit = 'g/dL' then ' against %.1f %s %.0f h earlier'
                                    else ' against %.0f %s %.0f h earlier' end,
                               prev_value, unit, hours_since_prev), '')
            || coalesce(printf(case when unit = 'g/dL' then ' %s %.1f %s %.0f h later' else ' %s %.0f %s %.0f h later' end,
                               case when prev_value is not null then 'and' else 'against' end,
                               next_value, unit, hours_to_next), '')
            as words
    from labelled
)
select
    sample_id,
    string_agg(words, '; ' order by analyte) filter (where out_of_line or away_and_back or moved_one_sided)
        as words_changed,
    string_agg(words, '; ' order by analyte) as words_all,
    -- keys in analyte order (a grouped JSON object has no order of its own)
    to_json(map(
        list(analyte order by analyte),
        list(json_object('value', value, 'previous', prev_value, 'next', next_value,
                         'hours_since_previous', round(hours_since_prev, 1),
                         'hours_to_next', round(hours_to_next, 1),
                         'limit_previous', round(limit_prev, 2),
                         'limit_next', round(limit_next, 2)) order by analyte)
    )) as evidence
from described
group by sample_id;
