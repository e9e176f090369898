-- A sample diluted by a line flush (shared work in 05_delta_neighbours.sql,
-- delta_judged.dilution_pattern): haemoglobin down against the patient's neighbouring samples
-- with chloride up toward saline, or glucose up with electrolytes down toward a glucose infusion.
-- Medium severity when only one neighbour is there to compare with.
select
    sample_id,
    case when not two_sided then 'medium' end as severity,
    'possible sample diluted by a line flush or infusion: ' || words_changed
        || '; check how the sample was drawn (dead space discarded, infusion paused); do not withdraw a result '
        || 'on this flag alone' as message,
    evidence
from delta_judged
where dilution_pattern;
