-- Room air or low FiO2, PaO2 pulled up toward room-air PO2 beyond the alveolar PO2
-- (negative A-a gradient) with a low PaCO2; a sample saturation far above the simultaneous
-- pulse oximeter reading; or the diluted extreme (PaCO2 < 15, pH > 7.6).
select
    sample_id,
    null as severity,
    case when paco2_mmhg < 15 and ph > 7.6
         then printf('PaCO2 %.0f mmHg with pH %.2f: sample diluted or exposed to air', paco2_mmhg, ph)
         when arterial_saturation_pct - spo2_pct >= $discordance_pct
         then printf('sample saturation %.0f %% (PaO2 %.0f mmHg) far above the SpO2 of %.0f %% at sampling: '
                     'pattern of air in the syringe', arterial_saturation_pct, pao2_mmhg, spo2_pct)
         else printf('PaO2 %.0f mmHg above the alveolar PO2 of %.0f mmHg on FiO2 %.2f with PaCO2 %.0f mmHg: '
                     'pattern of air in the syringe', pao2_mmhg, pao2_alveolar_mmhg, fio2_used, paco2_mmhg)
    end as message,
    json_object('pao2_mmhg', pao2_mmhg, 'pao2_alveolar_mmhg', round(pao2_alveolar_mmhg, 1), 'fio2', fio2_used,
                'paco2_mmhg', paco2_mmhg, 'ph', ph, 'spo2_pct', spo2_pct) as evidence
from rule_input
where is_arterial_or_unknown
  and (
      (fio2_used <= $fio2_max
       and pao2_mmhg between $pao2_min_mmhg and $pao2_max_mmhg
       and paco2_mmhg < $paco2_max_mmhg
       and aa_gradient_mmhg < $aa_gradient_max_mmhg)
      or (paco2_mmhg < 15 and ph > 7.6)
      or arterial_saturation_pct - spo2_pct >= $discordance_pct
  );
