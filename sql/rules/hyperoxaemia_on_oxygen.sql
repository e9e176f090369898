-- Clinical: the derived oxygen status is hyperoxaemic (PaO2 high while on supplemental oxygen).
select
    sample_id,
    case when pao2_mmhg > $severe_pao2_mmhg then 'high' when pao2_mmhg > $moderate_pao2_mmhg then 'medium' end
        as severity,
    printf('PaO2 %.0f mmHg on FiO2 %.2f', pao2_mmhg, fio2_used) as message,
    json_object('pao2_mmhg', pao2_mmhg, 'fio2', fio2_used, 'o2_device', o2_device) as evidence
from rule_input
where oxygen_status = 'hyperoxaemic';
