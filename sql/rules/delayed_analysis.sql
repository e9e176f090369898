-- Collection to result longer than the limit for a syringe at room temperature.
select
    sample_id,
    case when turnaround_min > $strong_minutes then 'high' end as severity,
    'possibly altered by delay: ' || (
    printf('analysed %.0f minutes after collection (limit %.0f)', turnaround_min, $warn_minutes)
    ) || '; PO2, PCO2, pH and lactate drift in the syringe, check how the sample was stored and sent; do not withdraw a result on this flag alone' as message,
    json_object('minutes_to_analysis', round(turnaround_min, 1), 'limit_minutes', $warn_minutes) as evidence
from rule_input
where turnaround_min > $warn_minutes;
