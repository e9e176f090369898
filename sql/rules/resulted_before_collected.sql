-- The result time precedes the collection time.
select
    sample_id,
    null as severity,
    printf('resulted %.0f minutes before it was collected', -turnaround_min) as message,
    json_object('minutes_to_analysis', round(turnaround_min, 1)) as evidence
from rule_input
where turnaround_min < -$tolerance_minutes;
