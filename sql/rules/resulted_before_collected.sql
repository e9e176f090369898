-- The result time precedes the collection time.
select
    sample_id,
    null as severity,
    'possible time or identity error: ' || (
    printf('resulted %.0f minutes before it was collected', -turnaround_min)
    ) || '; check the collection time and the sample''s label; do not withdraw a result on this flag alone' as message,
    json_object('minutes_to_analysis', round(turnaround_min, 1)) as evidence
from rule_input
where turnaround_min < -$tolerance_minutes;
