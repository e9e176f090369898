-- A measured cell held a text result instead of a number.
select
    sample_id,
    null as severity,
    printf('reported as %s', replace(result_status, '_', ' ')) as message,
    json_object('result_status', result_status) as evidence
from rule_input
where result_status <> 'reported';
