-- Labelled arterial, but PO2 or SO2 in the venous range while the pulse oximeter reads a
-- normal saturation, or the pulse oximeter reads far above the sample's saturation.
select
    sample_id,
    null as severity,
    printf('PO2 %.0f mmHg (saturation %.0f %%) in a sample labelled arterial while SpO2 was %.0f %%',
           pao2_mmhg, arterial_saturation_pct, spo2_pct) as message,
    json_object('pao2_mmhg', pao2_mmhg, 'sample_saturation_pct', round(arterial_saturation_pct, 1),
                'spo2_pct', spo2_pct, 'sample_type', sample_type) as evidence
from rule_input
where coalesce(sample_type, 'arterial') = 'arterial'
  and spo2_pct is not null
  and (
      ((pao2_mmhg < $pao2_max_mmhg or (sao2_pct < $so2_max_pct and not coalesce(sao2_is_calculated, false)))
       and spo2_pct >= $spo2_min_pct)
      or spo2_pct - arterial_saturation_pct >= $discordance_pct
  );
