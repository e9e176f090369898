-- No FiO2 and no room-air device on an arterial sample: oxygenation metrics cannot be computed.
select
    sample_id,
    null as severity,
    case when o2_device is null or o2_device = 'unknown' then 'neither FiO2 nor oxygen device documented'
         else printf('FiO2 not documented (device: %s)', replace(o2_device, '_', ' ')) end as message,
    json_object('fio2', fio2, 'o2_device', o2_device) as evidence
from rule_input
where is_arterial_or_unknown and fio2_used is null;
