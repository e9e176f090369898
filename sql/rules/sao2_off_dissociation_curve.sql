-- Measured SaO2 against the saturation predicted from PaO2 (Severinghaus, standardised for
-- pH, temperature and base excess), on the steep part of the curve only.
select
    sample_id,
    case when abs(sao2_residual_pct) > $strong_tolerance_pct then 'high' end as severity,
    printf('measured SaO2 %.1f %% differs by %.1f points from the %.1f %% predicted for PaO2 %.0f mmHg',
           sao2_pct, abs(sao2_residual_pct), predicted_sao2_pct, pao2_mmhg) as message,
    json_object('sao2_pct', sao2_pct, 'predicted_sao2_pct', round(predicted_sao2_pct, 1), 'pao2_mmhg', pao2_mmhg,
                'ph', ph, 'temperature_c', temperature_c) as evidence
from rule_input
where sao2_residual_pct is not null
  and pao2_mmhg <= $pao2_max_mmhg
  and predicted_sao2_pct between $predicted_min_pct and $predicted_max_pct
  and abs(sao2_residual_pct) > $tolerance_pct;
