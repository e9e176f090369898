-- Clinical: the pulse oximeter reads well above the arterial saturation of the sample, without
-- the strong evidence that makes it a venous sample (suspected_venous_sample). The arterial
-- value stands and the sample stays in the statistics: occult hypoxaemia by oximeter bias
-- (larger with darker skin pigmentation), or carboxyhaemoglobin read as oxyhaemoglobin by the
-- oximeter, are as likely as a venous sample.
select
    sample_id,
    null as severity,
    printf('SpO2 %.0f %% is %.0f points above the arterial saturation of %.0f %%%s: possible occult hypoxaemia '
           || '(oximeter over-reading, more often with darker skin), carboxyhaemoglobin%s, or a venous sample',
           spo2_pct, spo2_pct - arterial_saturation_pct, arterial_saturation_pct,
           case when arterial_saturation_pct < $occult_saturation_pct then ' (below '
                || printf('%.0f', $occult_saturation_pct) || ' %)' else '' end,
           case when cohb_pct is null then ' (COHb not reported)' else printf(' (COHb %.1f %%)', cohb_pct) end)
        as message,
    json_object('spo2_pct', spo2_pct, 'arterial_saturation_pct', round(arterial_saturation_pct, 1),
                'pao2_mmhg', pao2_mmhg, 'cohb_pct', cohb_pct) as evidence
from rule_input
where is_arterial_or_unknown
  and spo2_pct - arterial_saturation_pct >= $min_gap_pct
  and (arterial_saturation_pct < $occult_saturation_pct or spo2_pct - arterial_saturation_pct >= $discordance_pct)
  and sample_id not in (
      select sample_id from flags where rule_id = 'suspected_venous_sample' and run_id = $run_id
  );
