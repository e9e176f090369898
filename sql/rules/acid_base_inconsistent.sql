-- pH against the pH predicted by Henderson-Hasselbalch from PaCO2 and HCO3.
select
    sample_id,
    null as severity,
    'possible transcription or unit error: ' || (
    printf('pH %.2f differs by %.2f from the pH of %.2f predicted from PaCO2 %.0f mmHg and HCO3 %.1f mmol/L',
           ph, abs(acid_base_residual), ph_predicted, paco2_mmhg, hco3_mmol_l)
    ) || '; check the three values against the analyser printout; do not withdraw a result on this flag alone' as message,
    json_object('ph', ph, 'ph_predicted', round(ph_predicted, 3), 'paco2_mmhg', paco2_mmhg,
                'hco3_mmol_l', hco3_mmol_l, 'tolerance_ph', $tolerance_ph) as evidence
from rule_input
where abs(acid_base_residual) > $tolerance_ph;
