-- A sample labelled arterial (or of unknown type) that looks venous, on strong evidence only:
--   * PO2 in the venous range with a venous saturation while the pulse oximeter reads normal; or
--   * a PO2 below $venous_pao2_max_mmhg (venous, mixed, or another patient's hypoxaemic blood) whose
--     saturation is further below the simultaneous SpO2 than any documented oximeter error.
-- The sample's saturation is the co-oximeter's functional saturation, else the adult curve's
-- (neonatal blood with fetal haemoglobin has no curve reading). A smaller SpO2-SaO2 gap alone
-- is not called venous: rule spo2_above_arterial_saturation notes it as possible occult
-- hypoxaemia (oximeter bias, carboxyhaemoglobin) without excluding the sample.
select
    sample_id,
    null as severity,
    printf('possible venous sample: PO2 %.0f mmHg (saturation %.0f %%) in a sample labelled %s while SpO2 was %.0f %%; '
           || 'check how the sample was drawn (line, puncture) and repeat if the result matters; do not withdraw a '
           || 'result on this flag alone',
           pao2_mmhg, arterial_saturation_pct, coalesce(sample_type, 'with no type'), spo2_pct) as message,
    json_object('pao2_mmhg', pao2_mmhg, 'sample_saturation_pct', round(arterial_saturation_pct, 1),
                'spo2_pct', spo2_pct, 'sample_type', sample_type, 'discordance_pct',
                round(spo2_pct - arterial_saturation_pct, 1)) as evidence
from rule_input
where is_arterial_or_unknown
  and spo2_pct is not null
  and arterial_saturation_pct is not null
  and (
      (pao2_mmhg < $pao2_max_mmhg and arterial_saturation_pct < $so2_max_pct and spo2_pct >= $spo2_min_pct)
      or (pao2_mmhg < $venous_pao2_max_mmhg and spo2_pct - arterial_saturation_pct >= $discordance_pct)
  );
