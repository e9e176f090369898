-- Audit status of each record in scope, from its data-quality flags and sample type:
--   excluded  - not an arterial sample, or a high-severity data-quality flag of a rule whose
--               catalogue entry excludes (rule_catalogue.excludes_from_oxygenation: only findings
--               that make the record's numbers wrong for this patient; see the catalogue's
--               exclusion policy);
--   caution   - a data-quality flag of medium or high severity that does not exclude it;
--   usable    - otherwise.
-- Grain: one row per sample in scope_samples.
create table if not exists audit_status (
    sample_id varchar,
    audit_status varchar,
    reason varchar,
    run_id varchar
);

delete from audit_status where sample_id in (select sample_id from scope_samples);

insert into audit_status
with dq as (
    select
        f.sample_id,
        bool_or(c.excludes_from_oxygenation and f.severity = 'high') as excludes,
        bool_or(f.severity in ('high', 'medium')) as serious,
        string_agg(f.rule_id, ', ' order by f.rule_id) filter (where c.excludes_from_oxygenation and f.severity = 'high') as excluding_rules,
        string_agg(f.rule_id, ', ' order by f.rule_id) filter (where f.severity in ('high', 'medium')) as serious_rules
    from flags as f
    join rule_catalogue as c using (rule_id)
    where f.kind = 'data_quality'
      and f.sample_id in (select sample_id from scope_samples)
    group by f.sample_id
)
select
    r.sample_id,
    case
        when coalesce(r.sample_type, 'unknown') not in ('arterial', 'unknown') then 'excluded'
        when dq.excludes then 'excluded'
        when dq.serious then 'caution'
        else 'usable'
    end as audit_status,
    case
        when coalesce(r.sample_type, 'unknown') not in ('arterial', 'unknown') then 'sample type ' || r.sample_type
        when dq.excludes then dq.excluding_rules
        when dq.serious then dq.serious_rules
    end as reason,
    $run_id as run_id
from records as r
join scope_samples as s using (sample_id)
left join dq using (sample_id);
