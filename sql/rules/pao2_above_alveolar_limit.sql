-- PaO2 above the highest alveolar PO2 the documented FiO2 allows (alveolar gas equation,
-- R = 1). For low-flow devices the FiO2 used is the highest the device can deliver.
with bound as (
    select
        *,
        case when o2_device in ('nasal_cannula', 'simple_mask', 'reservoir_mask')
             then greatest(fio2_used, device_fio2_max(o2_device, o2_flow_l_min))
             else fio2_used end as fio2_bound
    from rule_input
    where is_arterial_or_unknown and pao2_mmhg is not null and paco2_mmhg is not null
),
limits as (
    select *, alveolar_po2_max_mmhg(fio2_bound, paco2_mmhg, pb_mmhg := pb_mmhg) as limit_mmhg
    from bound
    where fio2_bound is not null
)
select
    sample_id,
    null as severity,
    printf('PaO2 %.0f mmHg exceeds the alveolar PO2 of %.0f mmHg computed for FiO2 %.2f (%s), PaCO2 %.0f mmHg, PB %.0f mmHg',
           pao2_mmhg, limit_mmhg, fio2_bound,
           case when fio2_bound > fio2_used then 'upper limit of the documented device' else 'documented' end,
           paco2_mmhg, pb_mmhg) as message,
    json_object('pao2_mmhg', pao2_mmhg, 'alveolar_po2_limit_mmhg', round(limit_mmhg, 1), 'fio2', fio2_bound,
                'paco2_mmhg', paco2_mmhg, 'pb_mmhg', round(pb_mmhg, 1)) as evidence
from limits
where pao2_mmhg > limit_mmhg + greatest($tolerance_mmhg, $tolerance_fraction * limit_mmhg);
