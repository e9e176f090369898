-- Published: what run $run_id did with every file it saw (file name only, never its folder),
-- and whether its rows reconcile: rows in = loaded + quarantined + duplicates + superseded.
-- Grain: one row per file event of the run.
create or replace table audit_run_reconciliation as
select
    regexp_replace(source_path, '^.*[/\\]', '') as file_name,
    profile,
    outcome,
    reason_code,
    rows_in,
    rows_loaded,
    rows_quarantined,
    rows_duplicate,
    rows_superseded_in_file,
    case
        when outcome <> 'loaded' then null
        else rows_in = rows_loaded + rows_quarantined + rows_duplicate + rows_superseded_in_file
    end as balanced
from file_events
where run_id = $run_id
order by file_name;
