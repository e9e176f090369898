-- Values outside the plausible adult range (soft limits; the hard limits of
-- pipeline/schema.py already quarantined impossible numbers at ingestion).
with checks as (
    select
        sample_id,
        list_filter([
            case when pao2_mmhg < $pao2_min_mmhg or pao2_mmhg > $pao2_max_mmhg
                 then printf('PaO2 %.1f mmHg outside %.0f-%.0f', pao2_mmhg, $pao2_min_mmhg, $pao2_max_mmhg) end,
            case when paco2_mmhg < $paco2_min_mmhg or paco2_mmhg > $paco2_max_mmhg
                 then printf('PaCO2 %.1f mmHg outside %.0f-%.0f', paco2_mmhg, $paco2_min_mmhg, $paco2_max_mmhg) end,
            case when ph < $ph_min or ph > $ph_max
                 then printf('pH %.2f outside %.2f-%.2f', ph, $ph_min, $ph_max) end,
            case when hb_g_dl < $hb_min_g_dl or hb_g_dl > $hb_max_g_dl
                 then printf('Hb %.2f g/dL outside %.0f-%.0f', hb_g_dl, $hb_min_g_dl, $hb_max_g_dl) end,
            case when lactate_mmol_l < $lactate_min_mmol_l or lactate_mmol_l > $lactate_max_mmol_l
                 then printf('lactate %.2f mmol/L outside %.1f-%.0f', lactate_mmol_l, $lactate_min_mmol_l,
                             $lactate_max_mmol_l) end,
            case when na_mmol_l < $na_min_mmol_l or na_mmol_l > $na_max_mmol_l
                 then printf('Na %.0f mmol/L outside %.0f-%.0f', na_mmol_l, $na_min_mmol_l, $na_max_mmol_l) end,
            case when k_mmol_l < $k_min_mmol_l or k_mmol_l > $k_max_mmol_l
                 then printf('K %.1f mmol/L outside %.1f-%.1f', k_mmol_l, $k_min_mmol_l, $k_max_mmol_l) end,
            case when temperature_c < $temperature_min_c or temperature_c > $temperature_max_c
                 then printf('temperature %.1f C outside %.0f-%.0f (a Fahrenheit value?)', temperature_c,
                             $temperature_min_c, $temperature_max_c) end
        ], lambda x: x is not null) as problems
    from rule_input
)
select
    sample_id,
    null as severity,
    'possible transcription, unit or decimal error: ' || (
    array_to_string(problems, '; ')
    ) || '; check the value against the analyser printout; do not withdraw a result on this flag alone' as message,
    to_json(problems) as evidence
from checks
where len(problems) > 0;
