-- Clinical: P/F in a Berlin band, with PEEP or CPAP >= 5 cmH2O recorded.
select
    sample_id,
    null as severity,
    printf('P/F %.0f mmHg (%s band) on PEEP %.0f cmH2O', pf_ratio, pf_band, peep_cmh2o) as message,
    json_object('pf_ratio', round(pf_ratio, 0), 'pf_band', pf_band, 'peep_cmh2o', peep_cmh2o) as evidence
from rule_input
where pf_band in ('mild', 'moderate', 'severe') and pf_band_peep_met;
