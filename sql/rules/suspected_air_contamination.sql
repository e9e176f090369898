-- Air in the syringe: a composite of signs that together a real patient cannot show. Air
-- drags the sample's PO2 toward that of room air (about 150 mmHg at sea level) and its PCO2
-- toward zero, so pH rises. Each branch needs the PO2 moved toward air plus a sign that
-- physiology cannot explain:
--   * impossible: PaO2 above the R = 1 alveolar bound at the patient's temperature
--     (derived.pao2_excess_over_limit_mmhg) on low FiO2, with PCO2 pulled down;
--   * the bubble signature below the bound: PaO2 at or above the alveolar PO2 of the full
--     equation (no gradient at all, implausible at any age) with PCO2 pulled very low and pH high;
--   * the diluted extreme: PCO2 below 15 mmHg with pH above 7.6;
--   * a sample saturation far above the simultaneous pulse oximeter reading.
-- A young patient hyperventilating on air (PaO2 117, PaCO2 28) stays inside the bound and
-- above the very-low PCO2 limit, and is left alone.
with candidates as (
    select
        *,
        inspired_po2_mmhg(0.2095, pb_mmhg, ph2o_mmhg := water_vapour_pressure_mmhg($room_temperature_c)) as air_po2_mmhg,
        pao2_alveolar_full_patient_temp_mmhg as alveolar_full_mmhg
    from rule_input
    where is_arterial_or_unknown
),
judged as (
    select
        *,
        fio2_upper_bound <= $fio2_max and pao2_mmhg <= air_po2_mmhg + $air_margin_mmhg as toward_air,
        pao2_excess_over_limit_mmhg > 0 and paco2_mmhg < $paco2_max_mmhg as impossible,
        pao2_mmhg >= $pao2_min_mmhg and paco2_mmhg < $paco2_very_low_mmhg and ph > $ph_high
            and pao2_patient_temp_mmhg >= alveolar_full_mmhg - $aa_gradient_max_mmhg as bubble_signature,
        paco2_mmhg < 15 and ph > 7.6 as diluted_extreme,
        arterial_saturation_pct - spo2_pct >= $discordance_pct as above_oximeter
    from candidates
)
select
    sample_id,
    null as severity,
    'possible air in the syringe: ' || case
        when diluted_extreme
            then printf('PaCO2 %.0f mmHg with pH %.2f', paco2_mmhg, ph)
        when toward_air and impossible
            then printf('PaO2 %.0f mmHg, between the patient''s and room air''s PO2 (%.0f mmHg), exceeds the '
                        || 'alveolar bound of %.0f mmHg on FiO2 %.2f, with PaCO2 pulled down to %.0f mmHg',
                        pao2_mmhg, air_po2_mmhg, pao2_limit_patient_temp_mmhg, fio2_upper_bound, paco2_mmhg)
        when toward_air and bubble_signature
            then printf('PaO2 %.0f mmHg leaves no gradient below the alveolar PO2 of %.0f mmHg on FiO2 %.2f, '
                        || 'with PaCO2 %.0f mmHg and pH %.2f', pao2_mmhg, alveolar_full_mmhg, fio2_used,
                        paco2_mmhg, ph)
        else printf('sample saturation %.0f %% (PaO2 %.0f mmHg) far above the SpO2 of %.0f %% at sampling',
                    arterial_saturation_pct, pao2_mmhg, spo2_pct)
    end || '; check for bubbles, delay or pneumatic-tube transport, repeat if the result matters; '
        || 'do not withdraw a result on this flag alone' as message,
    json_object('pao2_mmhg', pao2_mmhg, 'air_po2_mmhg', round(air_po2_mmhg, 1),
                'alveolar_po2_limit_mmhg', round(pao2_limit_patient_temp_mmhg, 1),
                'alveolar_po2_full_mmhg', round(alveolar_full_mmhg, 1), 'fio2', fio2_upper_bound,
                'paco2_mmhg', paco2_mmhg, 'ph', ph, 'spo2_pct', spo2_pct,
                'sample_saturation_pct', round(arterial_saturation_pct, 1)) as evidence
from judged
where diluted_extreme
   or (toward_air and (impossible or bubble_signature))
   or above_oximeter;
