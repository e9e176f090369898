-- Delta check (shared work in 05_delta_neighbours.sql, delta_judged.wrong_blood_severity):
-- the sample's stable analytes do not fit the same patient's neighbouring samples.
select
    sample_id,
    wrong_blood_severity as severity,
    'possible wrong blood in tube: ' || words_changed || ' in the same patient'
        || case when wrong_blood_severity = 'medium'
                then ' (compared on one side only: either sample may be the other patient''s)' else '' end
        || '; check the sample''s identification and the patient''s other results, and ask the ward; do not '
        || 'withdraw a result on this flag alone' as message,
    evidence
from delta_judged
join delta_evidence using (sample_id)
where wrong_blood_severity is not null;
