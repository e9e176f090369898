-- Reconciliation of one file: every data record in exactly one outcome.
select
    count(*) as rows_parsed,
    count(*) filter (where outcome = 'quarantined') as rows_quarantined,
    count(*) filter (where outcome = 'duplicate') as rows_duplicate_in_file,
    count(*) filter (where outcome = 'superseded_in_file') as rows_superseded_in_file,
    (select count(*) from stage_merge where merge_outcome = 'new') as rows_new,
    (select count(*) from stage_merge where merge_outcome = 'correction') as rows_corrected,
    (select count(*) from stage_merge where merge_outcome = 'duplicate') as rows_duplicate_of_store
from stage_checked;
