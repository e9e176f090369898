-- Documented FiO2 outside what the documented device (and flow) can deliver; a Venturi
-- valve delivers only its labelled settings; room air with an oxygen flow is a contradiction.
with checked as (
    select
        *,
        device_fio2_min(o2_device, o2_flow_l_min) as fio2_low,
        device_fio2_max(o2_device, o2_flow_l_min) as fio2_high
    from rule_input
    where fio2 is not null and o2_device is not null
)
select
    sample_id,
    null as severity,
    'possible documentation error: ' || (
    case
        when o2_device = 'venturi_mask' and venturi_labelled_fio2(fio2) is null
            then printf('documented FiO2 %.2f is not a Venturi valve setting (0.24, 0.28, 0.31, 0.35, 0.40, 0.50, 0.60)', fio2)
        when o2_device = 'room_air' and o2_flow_l_min > 0
            then printf('device documented as room air with an oxygen flow of %.1f L/min', o2_flow_l_min)
        else printf('documented FiO2 %.2f is outside %.2f-%.2f deliverable by %s%s', fio2, fio2_low, fio2_high,
                    replace(o2_device, '_', ' '),
                    case when o2_flow_l_min is not null then printf(' at %.1f L/min', o2_flow_l_min) else '' end)
    end
    ) || '; check the device, flow and FiO2 charted at sampling; do not withdraw a result on this flag alone' as message,
    json_object('fio2', fio2, 'o2_device', o2_device, 'o2_flow_l_min', o2_flow_l_min,
                'device_fio2_min', fio2_low, 'device_fio2_max', fio2_high) as evidence
from checked
where fio2 < fio2_low - $tolerance
   or fio2 > fio2_high + $tolerance
   or (o2_device = 'venturi_mask' and venturi_labelled_fio2(fio2) is null)
   or (o2_device = 'room_air' and o2_flow_l_min > 0);
