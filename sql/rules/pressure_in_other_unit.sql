-- One value in the other pressure unit: implausible as stored, consistent after converting
-- by 7.50062 (kPa <-> mmHg). PCO2 is judged by Henderson-Hasselbalch, PO2 by the measured
-- SaO2 on the dissociation curve (functional, and only when carboxy- and methaemoglobin are not
-- raised: see decimal_slip).
with inputs as (
    select *, sao2_curve_pct as saturation_for_check
    from rule_input
    where is_arterial_or_unknown
),
candidates as (
    select
        *,
        abs(acid_base_residual(ph, kpa_to_mmhg(paco2_mmhg), hco3_mmol_l)) <= $tolerance_ph as paco2_fits_as_kpa,
        abs(acid_base_residual(ph, mmhg_to_kpa(paco2_mmhg), hco3_mmol_l)) <= $tolerance_ph as paco2_fits_as_mmhg,
        abs(saturation_for_check - predicted_sao2_pct(kpa_to_mmhg(pao2_mmhg), ph := coalesce(ph, 7.4)))
            <= $tolerance_sat_pct as pao2_fits_as_kpa,
        abs(saturation_for_check - predicted_sao2_pct(mmhg_to_kpa(pao2_mmhg), ph := coalesce(ph, 7.4)))
            <= $tolerance_sat_pct as pao2_fits_as_mmhg
    from inputs
)
select
    sample_id,
    null as severity,
    'possible unit error: ' || (
    case
        when paco2_mmhg < 15 and paco2_fits_as_kpa
            then printf('PaCO2 %.1f looks like kPa: as %.0f mmHg it fits pH %.2f and HCO3 %.0f', paco2_mmhg,
                        kpa_to_mmhg(paco2_mmhg), ph, hco3_mmol_l)
        when paco2_mmhg > 100 and paco2_fits_as_mmhg
            then printf('PaCO2 %.0f mmHg looks like a mmHg value read as kPa: %.0f mmHg fits pH %.2f and HCO3 %.0f',
                        paco2_mmhg, mmhg_to_kpa(paco2_mmhg), ph, hco3_mmol_l)
        when pao2_mmhg < 20 and pao2_fits_as_kpa
            then printf('PaO2 %.1f looks like kPa: as %.0f mmHg it fits the measured SaO2 %.0f %%', pao2_mmhg,
                        kpa_to_mmhg(pao2_mmhg), saturation_for_check)
        else printf('PaO2 %.0f mmHg looks like a mmHg value read as kPa: %.0f mmHg fits the measured SaO2 %.0f %%',
                    pao2_mmhg, mmhg_to_kpa(pao2_mmhg), saturation_for_check)
    end
    ) || '; check the value against the analyser printout; do not withdraw a result on this flag alone' as message,
    json_object('paco2_mmhg', paco2_mmhg, 'pao2_mmhg', pao2_mmhg, 'ph', ph, 'hco3_mmol_l', hco3_mmol_l,
                'sao2_functional_pct', round(saturation_for_check, 1)) as evidence
from candidates
where (paco2_mmhg < 15 and paco2_fits_as_kpa)
   or (paco2_mmhg > 100 and paco2_fits_as_mmhg)
   or (pao2_mmhg < 20 and pao2_fits_as_kpa)
   or (pao2_excess_over_limit_mmhg > 0 and pao2_fits_as_mmhg
       and mmhg_to_kpa(pao2_mmhg) < pao2_limit_patient_temp_mmhg);
