-- Reconciliation of one file: every data record in exactly one outcome.
-- Rows not set aside in stage 2 are kept; kept rows are new, corrections of a held
-- record, or duplicates of one (stage_held).
with parsed as (
    select count(*) as rows_parsed from stage_row_keys
),
set_aside as (
    select
        count(*) filter (where outcome = 'quarantined') as rows_quarantined,
        count(*) filter (where outcome = 'duplicate') as rows_duplicate_in_file,
        count(*) filter (where outcome = 'superseded_in_file') as rows_superseded_in_file,
        count(*) as rows_set_aside
    from stage_set_aside
),
held as (
    select
        count(*) filter (where not same_values) as rows_corrected,
        count(*) filter (where same_values) as rows_duplicate_of_store
    from stage_held
)
select
    rows_parsed,
    rows_quarantined,
    rows_duplicate_in_file,
    rows_superseded_in_file,
    rows_parsed - rows_set_aside - rows_corrected - rows_duplicate_of_store as rows_new,
    rows_corrected,
    rows_duplicate_of_store
from parsed, set_aside, held;
