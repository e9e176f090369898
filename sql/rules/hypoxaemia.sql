-- Clinical: the derived oxygen status is hypoxaemic.
select
    sample_id,
    null as severity,
    printf('PaO2 %.0f mmHg, saturation %.0f %%', pao2_mmhg, arterial_saturation_pct) as message,
    json_object('pao2_mmhg', pao2_mmhg, 'arterial_saturation_pct', round(arterial_saturation_pct, 1), 'fio2', fio2_used)
        as evidence
from rule_input
where oxygen_status = 'hypoxaemic';
