-- Detection of injected faults and specificity on clinical look-alikes, against the demo's truth files.
-- Views: ground_truth (sample_id, fault_type, physically_visible) and lookalike_truth (sample_id,
-- lookalike_kind; may be empty). Needs the store's records, quarantine, merged_duplicates, flags and
-- audit_status.
-- A faulted sample counts as caught when it has a data-quality flag, a quarantined row, or (for an
-- exported duplicate) was merged instead of stored twice. A look-alike counts as flagged when it has a
-- data-quality flag, and as excluded when its audit status is 'excluded' although it is labelled
-- arterial or unknown (excluded for a data-quality reason, not for its sample type). Clean records are
-- records in neither truth file. The last three statements return the per-fault table, the per-kind
-- look-alike table and the clean-record table.
create or replace temp table detection_dq as
select sample_id, string_agg(distinct rule_id, ',' order by rule_id) as rules
from flags
where kind = 'data_quality'
group by sample_id;

create or replace temp table detection_by_sample as
with quarantined as (
    select sample_id, string_agg(distinct 'quarantine:' || reason_code, ',') as rules
    from quarantine
    where sample_id is not null
    group by sample_id
),
merged as (
    select sample_id, 'merged duplicate' as rules
    from merged_duplicates
    group by sample_id
)
select
    t.sample_id,
    t.fault_type,
    t.physically_visible,
    concat_ws(',', dq.rules, q.rules, case when t.fault_type = 'duplicate_export' then m.rules end) as caught_by
from ground_truth as t
left join detection_dq as dq using (sample_id)
left join quarantined as q using (sample_id)
left join merged as m using (sample_id);

create or replace temp table detection_lookalike_by_sample as
select
    l.sample_id,
    l.lookalike_kind,
    r.sample_id is not null as loaded,
    coalesce(dq.rules, '') as flagged_by,
    coalesce(a.audit_status = 'excluded' and coalesce(r.sample_type, 'unknown') in ('arterial', 'unknown'), false)
        as excluded
from lookalike_truth as l
left join records as r using (sample_id)
left join detection_dq as dq using (sample_id)
left join audit_status as a using (sample_id);

select
    fault_type,
    count(*) as injected,
    count(*) filter (where physically_visible) as visible,
    count(*) filter (where physically_visible and caught_by <> '') as caught,
    count(*) filter (where physically_visible and caught_by <> '')::double
        / nullif(count(*) filter (where physically_visible), 0) as caught_share,
    (select string_agg(rule, ', ' order by n desc, rule)
     from (select unnest(string_split(caught_by, ',')) as rule, count(*) as n
           from detection_by_sample as d
           where d.fault_type = s.fault_type and caught_by <> ''
           group by rule
           order by n desc, rule
           limit 3)) as main_rules
from detection_by_sample as s
group by fault_type
order by fault_type;

select
    lookalike_kind,
    count(*) as records,
    count(*) filter (where not loaded) as not_loaded,
    count(*) filter (where flagged_by <> '') as flagged,
    count(*) filter (where flagged_by <> '')::double / nullif(count(*), 0) as flag_share,
    count(*) filter (where excluded) as excluded,
    (select string_agg(rule || ' (' || n || ')', ', ' order by n desc, rule)
     from (select unnest(string_split(flagged_by, ',')) as rule, count(*) as n
           from detection_lookalike_by_sample as d
           where d.lookalike_kind = s.lookalike_kind and flagged_by <> ''
           group by rule
           order by n desc, rule
           limit 3)) as main_rules
from detection_lookalike_by_sample as s
group by lookalike_kind
order by lookalike_kind;

with clean as (
    select r.sample_id, coalesce(dq.rules, '') as flagged_by
    from records as r
    left join detection_dq as dq using (sample_id)
    where r.sample_id not in (select sample_id from ground_truth)
      and r.sample_id not in (select sample_id from lookalike_truth)
)
select
    count(*) as clean_records,
    count(*) filter (where flagged_by <> '') as flagged,
    count(*) filter (where flagged_by <> '')::double / nullif(count(*), 0) as flag_share,
    (select string_agg(rule || ' (' || n || ')', ', ' order by n desc, rule)
     from (select unnest(string_split(flagged_by, ',')) as rule, count(*) as n
           from clean
           where flagged_by <> ''
           group by rule
           order by n desc, rule
           limit 3)) as main_rules
from clean;
