-- The record replaced an earlier delivery of the same sample with other values.
select
    i.sample_id,
    null as severity,
    'amended after release: ' || (
    printf('version %d of this sample; %d earlier version(s) with other values in superseded_records',
           i.version, count(s.sample_id))
    ) || '; check that the amendment was explained to the ward; do not withdraw a result on this flag alone' as message,
    json_object('version', i.version, 'superseded_versions', count(s.sample_id)) as evidence
from rule_input as i
join superseded_records as s using (sample_id)
where s.content_hash <> i.content_hash
group by i.sample_id, i.version;
