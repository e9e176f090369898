-- Detection of injected faults against a ground truth (view ground_truth: sample_id,
-- fault_type, physically_visible). Caught = a data-quality flag, a quarantined row, or a
-- duplicate merged instead of stored twice. The last two statements return the per-fault
-- table and the clean-record table.
create or replace temp table detection_by_sample as
with dq as (
    select sample_id, string_agg(distinct rule_id, ',' order by rule_id) as rules
    from flags
    where kind = 'data_quality'
    group by sample_id
),
quarantined as (
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
left join dq using (sample_id)
left join quarantined as q using (sample_id)
left join merged as m using (sample_id);

select
    fault_type,
    count(*) as injected,
    count(*) filter (where physically_visible) as visible,
    count(*) filter (where physically_visible and caught_by <> '') as caught,
    count(*) filter (where physically_visible and caught_by <> '')::double
        / nullif(count(*) filter (where physically_visible), 0) as caught_share,
    (select string_agg(rule, ', ' order by n desc)
     from (select unnest(string_split(caught_by, ',')) as rule, count(*) as n
           from detection_by_sample as d
           where d.fault_type = s.fault_type and caught_by <> ''
           group by rule
           order by n desc
           limit 3)) as main_rules
from detection_by_sample as s
group by fault_type
order by fault_type;

select
    count(*) as clean_records,
    count(*) filter (where sample_id in (select sample_id from flags where kind = 'data_quality')) as flagged,
    count(*) filter (where sample_id in (select sample_id from flags where kind = 'data_quality'))::double
        / nullif(count(*), 0) as flag_share
from records
where sample_id not in (select sample_id from ground_truth);
