-- A value ten times too large or too small: impossible as stored, consistent after moving
-- the decimal point (Henderson-Hasselbalch for PCO2; measured SaO2, or the alveolar limit
-- when SaO2 is not measured, for PO2). The saturation is the measured functional one
-- (derived.sao2_curve_pct), and only when carboxy- and methaemoglobin are not raised (they
-- shift the curve, and a patient with carbon monoxide poisoning on a reservoir mask has a high
-- PaO2 with a low oxyhaemoglobin fraction that must not read as a slip).
with inputs as (
    select *, sao2_curve_pct as saturation_for_check
    from rule_input
    where is_arterial_or_unknown
),
candidates as (
    select
        *,
        abs(acid_base_residual(ph, paco2_mmhg / 10.0, hco3_mmol_l)) <= $tolerance_ph as paco2_fits_divided,
        abs(acid_base_residual(ph, paco2_mmhg * 10.0, hco3_mmol_l)) <= $tolerance_ph as paco2_fits_multiplied,
        -- Without a measured SaO2 only a PaO2 impossible on any FiO2 (above the FiO2 1.0 limit) is
        -- read as a slip; below that, an under-documented FiO2 explains it as well.
        case when saturation_for_check is not null and predicted_sao2_pct(pao2_mmhg / 10.0) <= 97
             then abs(saturation_for_check - predicted_sao2_pct(pao2_mmhg / 10.0, ph := coalesce(ph, 7.4)))
                  <= $tolerance_sat_pct
             else pao2_mmhg > alveolar_po2_max_mmhg(1.0, paco2_mmhg, pb_mmhg := pb_mmhg) + 5
                  and pao2_mmhg / 10.0 <= pao2_limit_patient_temp_mmhg end as pao2_fits_divided,
        case when saturation_for_check is not null
             then abs(saturation_for_check - predicted_sao2_pct(pao2_mmhg * 10.0, ph := coalesce(ph, 7.4)))
                  <= $tolerance_sat_pct
             else pao2_mmhg * 10.0 <= pao2_limit_patient_temp_mmhg end as pao2_fits_multiplied,
        -- a low PaO2 that the measured saturation flatly contradicts (PaO2 22.5 with SaO2 99 %)
        saturation_for_check is not null and age_group in ('adult', 'unknown')
            and saturation_for_check - predicted_sao2_pct(pao2_mmhg, ph := coalesce(ph, 7.4)) > $contradiction_pct
            as low_pao2_contradicted
    from inputs
)
select
    sample_id,
    null as severity,
    'possible decimal slip: ' || (
    case
        when paco2_mmhg > 100 and paco2_fits_divided
            then printf('PaCO2 %.0f mmHg fits pH and HCO3 only as %.1f mmHg (decimal point shifted)', paco2_mmhg, paco2_mmhg / 10)
        when paco2_mmhg < 15 and paco2_fits_multiplied
            then printf('PaCO2 %.1f mmHg fits pH and HCO3 only as %.0f mmHg (decimal point shifted)', paco2_mmhg, paco2_mmhg * 10)
        when pao2_mmhg < 20 and pao2_fits_multiplied
            then printf('PaO2 %.1f mmHg is only plausible as %.0f mmHg (decimal point shifted)', pao2_mmhg, pao2_mmhg * 10)
        when pao2_mmhg < $low_pao2_mmhg and pao2_fits_multiplied and low_pao2_contradicted
            then printf('PaO2 %.1f mmHg contradicts the measured SaO2 of %.0f %%; %.0f mmHg fits it (decimal point shifted)',
                        pao2_mmhg, saturation_for_check, pao2_mmhg * 10)
        else printf('PaO2 %.0f mmHg exceeds the alveolar limit of %.0f mmHg; %.1f mmHg would fit (decimal point shifted)',
                    pao2_mmhg, pao2_limit_patient_temp_mmhg, pao2_mmhg / 10)
    end
    ) || '; check the value against the analyser printout; do not withdraw a result on this flag alone' as message,
    json_object('paco2_mmhg', paco2_mmhg, 'pao2_mmhg', pao2_mmhg, 'alveolar_po2_limit_mmhg',
                round(pao2_limit_patient_temp_mmhg, 1), 'sao2_functional_pct', round(saturation_for_check, 1), 'ph', ph,
                'hco3_mmol_l', hco3_mmol_l) as evidence
from candidates
where (paco2_mmhg > 100 and paco2_fits_divided)
   or (paco2_mmhg < 15 and paco2_fits_multiplied)
   or (pao2_mmhg < 20 and pao2_fits_multiplied)
   or (pao2_mmhg < $low_pao2_mmhg and pao2_fits_multiplied and low_pao2_contradicted)
   or (pao2_excess_over_limit_mmhg > 0 and pao2_mmhg / 10.0 >= 20 and pao2_fits_divided);
