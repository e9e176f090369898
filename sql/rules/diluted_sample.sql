-- A sample diluted by a line flush (shared work in 05_delta_neighbours.sql,
-- delta_judged.dilution_pattern): against the patient's nearer neighbouring sample, haemoglobin
-- down with chloride up toward saline, or with glucose up and sodium down toward a glucose
-- infusion, by the same share of flush fluid. Medium severity when only one neighbour is there
-- to compare with (the change may be lasting).
select
    sample_id,
    case when not dilution_two_sided then 'medium' end as severity,
    printf('possible sample diluted by a line flush or infusion (about %.0f %% flush fluid): ', 100 * hb_share)
        || words_all
        || '; check how the sample was drawn (dead space discarded, infusion paused); do not withdraw a result '
        || 'on this flag alone' as message,
    evidence
from delta_judged
join delta_evidence using (sample_id)
where dilution_pattern;
