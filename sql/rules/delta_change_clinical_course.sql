-- Clinical note: haemoglobin or sodium changed since the patient's previous sample by more than
-- its reference change value, in a way a clinical course explains (no wrong-blood or dilution
-- pattern). Information for the reviewer, never a data-quality finding.
select
    sample_id,
    null as severity,
    concat_ws('; ',
        case when hb_change > 0
             then printf('Hb rose %.1f g/dL in %.0f h: consistent with transfusion', hb_change, hb_hours)
             when hb_change < 0
             then printf('Hb fell %.1f g/dL in %.0f h: bleeding, haemodilution (fluids, bypass) or a diluted sample',
                         -hb_change, hb_hours) end,
        case when na_change is not null
             then printf('Na %s %.0f mmol/L in %.0f h (%.0f mmol/L per 24 h): check the rate against local limits',
                         case when na_change > 0 then 'rose' else 'fell' end, abs(na_change), na_hours,
                         abs(na_change) * 24.0 / greatest(na_hours, 1.0)) end
    ) as message,
    evidence
from delta_judged
join delta_evidence using (sample_id)
where wrong_blood_severity is null
  and not dilution_pattern
  and (hb_change is not null or na_change is not null);
