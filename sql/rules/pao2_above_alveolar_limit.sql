-- PaO2 above the highest alveolar PO2 the documented FiO2 allows (alveolar gas equation with
-- R = 1, plus tolerance). Like is compared with like: the 37 C PaO2 and PaCO2 are corrected to
-- the patient's temperature and the water vapour pressure is taken at that temperature
-- (derived.pao2_excess_over_limit_mmhg). For low-flow devices the FiO2 is the highest the device
-- can deliver. Outside the configured temperature band nothing is compared (derived.alveolar_check_note).
select
    sample_id,
    null as severity,
    printf('possible under-documented oxygen: PaO2 %.0f mmHg%s exceeds the highest alveolar PO2 of %.0f mmHg '
           || 'for FiO2 %.2f (%s), PaCO2 %.0f mmHg, PB %.0f mmHg; check the FiO2 and device charted at sampling, '
           || 'then air in the syringe or the sample''s identity; do not withdraw a result on this flag alone',
           pao2_mmhg,
           case when gas_temperature_c <> 37.0
                then printf(' (%.0f mmHg at the patient''s %.1f C)', pao2_patient_temp_mmhg, gas_temperature_c)
                else '' end,
           pao2_limit_patient_temp_mmhg, fio2_upper_bound,
           case when fio2_upper_bound > coalesce(fio2_used, 0) then 'upper limit of the documented device'
                else 'documented' end,
           paco2_patient_temp_mmhg, pb_mmhg) as message,
    json_object('pao2_mmhg', pao2_mmhg, 'pao2_patient_temp_mmhg', round(pao2_patient_temp_mmhg, 1),
                'alveolar_po2_limit_mmhg', round(pao2_limit_patient_temp_mmhg, 1), 'fio2', fio2_upper_bound,
                'paco2_patient_temp_mmhg', round(paco2_patient_temp_mmhg, 1), 'temperature_c', gas_temperature_c,
                'pb_mmhg', round(pb_mmhg, 1)) as evidence
from rule_input
where is_arterial_or_unknown
  and pao2_excess_over_limit_mmhg > 0;
