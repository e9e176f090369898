-- The audit's persistent aggregate layer, brought up to date for the samples of
-- audit_layer_scope (01_audit_layer_scope.sql: this run's samples; 01_audit_layer_reset.sql:
-- every record). Everything downstream (window, cells, suppression, rates, charts, funnel)
-- reads the small per-(unit, period) tables, so a nightly run costs what its new samples
-- touch, not what the store holds.
--   audit_sample_fact           one row per record with a collection time and an audit
--                               status: its unit, period ($period of the collection time in
--                               UTC) and one boolean per count family (the families of
--                               10_audit_cell.sql; denominators as stated there).
--                               Oxygenation families count adults only (derived.age_group
--                               'adult', or 'unknown': no age and no birth date, to whom the
--                               derive stage applies adult targets); neonates and children
--                               are counted apart by age group, since the adult targets, the
--                               adult A-a formula and the saturation curve check do not apply
--                               to them. An oxygen status of 'not_assessed' (no target) or
--                               'oxygen_unknown' (nothing documented) never enters an
--                               in-target or above-target count.
--   audit_sample_flag           one row per (record of audit_sample_fact, data-quality or
--                               documentation rule that flagged it).
--   audit_unit_period_counts    per (unit, period): every family's count, distinct patients
--                               and the latest collection time.
--   audit_unit_period_flags     per (unit, period, rule): samples flagged.
--   audit_unit_period_patients  per (unit, period): the distinct patient_key values, so that
--                               patients over several periods or units are counted once.
--   audit_unit_period_age_bands per (unit, period, adult age band): the oxygenation and
--                               prescribing families that are also published by age band
--                               (audit_age_band_rates), so units are compared band by band.
--   audit_episode               one row per episode (an encounter, or a patient-day where no
--                               encounter is exported: derived.episode_key) with an included
--                               adult arterial sample with a target that applies: the unit
--                               and period of its first such sample and its outcomes. An
--                               episode is recomputed from all its facts when one of its
--                               samples is in scope (a later sample changes what it counts).
--   audit_unit_period_episodes  per (unit, period): the episodes of audit_episode placed there.
-- Prescribing families (rx_*) count included adult arterial samples with a target that
-- applies (oxygen_assessed) and supplemental oxygen documented (on_oxygen), by the
-- prescription linked to them in the derive stage (derived.prescription_status); the
-- hypercapnic-risk agreement counts such samples with a prescribed target whether on
-- oxygen or not.
-- A (unit, period) pair is re-aggregated only when one of its facts changed: a new sample,
-- a corrected one (also in the pair it moved out of), or a changed flag or status.

-- Facts of the samples in scope as they are now.
create or replace temp table audit_fact_now as
with placed as (
    select
        r.sample_id,
        r.patient_key,
        coalesce(r.unit, '(unit not recorded)') as unit,
        r.collected_at,
        cast(date_trunc($period, r.collected_at) as date) as period_start,
        a.audit_status,
        coalesce(r.sample_type, 'unknown') in ('arterial', 'unknown') as arterial,
        -- no derived row, or no age and no birth date: 'unknown' (adult targets apply)
        coalesce(d.age_group, 'unknown') as age_group,
        d.fio2_used,
        r.o2_device,
        d.oxygen_status,
        coalesce(d.on_supplemental_oxygen, false) as on_supplemental_oxygen,
        d.arterial_saturation_pct,
        d.target_high_pct,
        d.target_low_pct,
        d.aa_gradient_excess_mmhg,
        d.pf_band,
        d.episode_key,
        d.age_years_used,
        d.prescription_status,
        d.prescribed_target_position,
        d.prescribed_target_conflicts_risk,
        r.hypercapnic_risk,
        m.sample_id is not null as device_flagged
    from audit_layer_scope as sc
    join records as r on r.sample_id = sc.sample_id
    join audit_status as a on a.sample_id = r.sample_id
    left join derived as d on d.sample_id = r.sample_id
    left join (
        select distinct f.sample_id
        from flags as f
        semi join audit_layer_scope as fs on fs.sample_id = f.sample_id
        where f.rule_id = 'fio2_outside_device_range'
    ) as m on m.sample_id = r.sample_id
    where r.collected_at is not null
),
status as (
    select
        *,
        -- included adult samples with an oxygen status and a target range that applies: the
        -- denominator of hypoxaemia and of the oxygen-status-unknown share
        audit_status in ('usable', 'caution') and age_group in ('adult', 'unknown')
            and oxygen_status is not null and oxygen_status <> 'not_assessed' as oxygen_assessed,
        -- included adult samples with an oxygen status whose documented FiO2 is not contradicted
        -- by their PaO2 ('undocumented_oxygen'): A-a gradient and P/F ratio use that FiO2
        audit_status in ('usable', 'caution') and age_group in ('adult', 'unknown')
            and oxygen_status is not null and oxygen_status <> 'undocumented_oxygen' as gas_exchange_assessed,
        -- supplemental oxygen documented (FiO2 above room air, or a device other than room air
        -- or unknown); never for an 'oxygen_unknown' status, whatever the inputs say
        on_supplemental_oxygen and oxygen_status is distinct from 'oxygen_unknown' as oxygen_documented_on,
        -- FiO2 typed, or implied (0.21) by a documented room-air device; device known
        arterial and fio2_used is not null and o2_device is not null and o2_device <> 'unknown'
            as fio2_device_documented
    from placed
)
select
    s.sample_id,
    s.patient_key,
    s.unit,
    s.period_start,
    s.collected_at,
    s.arterial,
    s.audit_status = 'usable' as samples_usable,
    s.audit_status = 'caution' as samples_caution,
    s.audit_status = 'excluded' as samples_excluded,
    s.audit_status = 'excluded' and not s.arterial as excluded_sample_type,
    s.audit_status = 'excluded' and s.arterial as excluded_data_quality,
    s.fio2_device_documented,
    s.fio2_device_documented and s.device_flagged as fio2_device_mismatch,
    s.age_group = 'adult' as age_adult,
    s.age_group = 'unknown' as age_unknown,
    s.age_group = 'child' as age_child,
    s.age_group = 'neonate' as age_neonate,
    s.oxygen_assessed,
    s.oxygen_assessed and s.oxygen_status = 'hypoxaemic' as hypoxaemic,
    s.oxygen_assessed and s.oxygen_status = 'oxygen_unknown' as oxygen_unknown,
    -- oxygen_assessed splits into on_oxygen (supplemental oxygen documented) and
    -- no_oxygen_documented (nothing documented, or room air): a partition (06_audit_partition.sql)
    s.oxygen_assessed and s.oxygen_documented_on as on_oxygen,
    s.oxygen_assessed and not s.oxygen_documented_on as no_oxygen_documented,
    -- PaO2 above what room air allows with no supplemental oxygen documented
    s.oxygen_assessed and not s.oxygen_documented_on and s.oxygen_status = 'undocumented_oxygen'
        as undocumented_oxygen,
    -- saturation above the applicable target range, whether or not PaO2 also counts as hyperoxaemic
    s.oxygen_assessed and s.oxygen_documented_on and s.arterial_saturation_pct > s.target_high_pct
        as above_target_on_oxygen,
    s.oxygen_assessed and s.oxygen_documented_on and s.oxygen_status = 'hyperoxaemic' as hyperoxaemic_on_oxygen,
    s.gas_exchange_assessed and s.aa_gradient_excess_mmhg is not null as aa_assessed,
    s.gas_exchange_assessed and s.aa_gradient_excess_mmhg > 0 as aa_above_limit,
    s.gas_exchange_assessed and s.pf_band is not null as pf_assessed,
    s.gas_exchange_assessed and s.pf_band = 'severe' as pf_severe,
    s.gas_exchange_assessed and s.pf_band = 'moderate' as pf_moderate,
    s.gas_exchange_assessed and s.pf_band = 'mild' as pf_mild,
    s.gas_exchange_assessed and s.pf_band = 'none' as pf_above_300,
    -- on oxygen, and whether a prescription (or its absence) is known for the sample
    s.oxygen_assessed and s.oxygen_documented_on and s.prescription_status is not null
        and s.prescription_status <> 'prescription_unknown' as rx_known,
    s.oxygen_assessed and s.oxygen_documented_on
        and s.prescription_status in ('prescribed', 'prescribed_without_target') as rx_active,
    s.oxygen_assessed and s.oxygen_documented_on and s.prescription_status = 'not_prescribed' as rx_not_prescribed,
    s.oxygen_assessed and s.oxygen_documented_on and s.prescription_status = 'prescribed' as rx_with_target,
    s.oxygen_assessed and s.oxygen_documented_on and s.prescription_status = 'prescribed'
        and s.prescribed_target_position is not null as rx_target_assessed,
    s.oxygen_assessed and s.oxygen_documented_on and s.prescription_status = 'prescribed'
        and s.prescribed_target_position = 'within' as rx_within_target,
    s.oxygen_assessed and s.oxygen_documented_on and s.prescription_status = 'prescribed'
        and s.prescribed_target_position = 'above' as rx_above_target,
    s.oxygen_assessed and s.oxygen_documented_on and s.prescription_status = 'prescribed'
        and s.prescribed_target_position = 'below' as rx_below_target,
    s.oxygen_assessed and s.prescription_status = 'prescribed' and s.hypercapnic_risk is not null
        as rx_risk_documented,
    s.oxygen_assessed and s.prescription_status = 'prescribed' and s.hypercapnic_risk is not null
        and coalesce(s.prescribed_target_conflicts_risk, false) as rx_target_conflicts_risk,
    -- episode facts: the episode, and whether this sample is out of its target on oxygen
    s.episode_key,
    s.oxygen_assessed and s.oxygen_documented_on
        and (s.arterial_saturation_pct > s.target_high_pct or s.arterial_saturation_pct < s.target_low_pct)
        as out_of_target_on_oxygen,
    -- adult age bands (common practice in audit tables; 'age unknown' holds the adults without an age)
    case
        when s.age_group = 'unknown' then 'age unknown'
        when s.age_group <> 'adult' then null
        when s.age_years_used < 45 then 'under 45'
        when s.age_years_used < 65 then '45-64'
        when s.age_years_used < 80 then '65-79'
        else '80 and over'
    end as age_band
from status as s;

create or replace temp table audit_flag_now as
select distinct f.sample_id, f.rule_id, n.unit, n.period_start
from flags as f
join audit_fact_now as n on n.sample_id = f.sample_id
where f.kind in ('data_quality', 'documentation');

create table if not exists audit_sample_fact as select * from audit_fact_now with no data;
create table if not exists audit_sample_flag as select * from audit_flag_now with no data;

-- The facts of the samples in scope as the layer holds them (one scan of the layer's facts).
create or replace temp table audit_fact_before as
select * from audit_sample_fact semi join audit_layer_scope using (sample_id);

-- The (unit, period) pairs whose facts changed: the pair a changed fact is in now and the
-- pair its previous version was in. An empty layer (a reset) held nothing before: every pair
-- of the facts now, without comparing each fact with nothing.
create or replace temp table audit_touched as
with layer as (
    select exists (select 1 from audit_sample_fact) as held
),
fact_before as (
    select * from audit_fact_before
),
flag_before as (
    select * from audit_sample_flag semi join audit_layer_scope using (sample_id)
),
compared_now as (
    select * from audit_fact_now where (select held from layer)
),
compared_flags_now as (
    select * from audit_flag_now where (select held from layer)
),
changed as (
    select unit, period_start from audit_fact_now where not (select held from layer)
    union all
    select unit, period_start from (select * from compared_now except select * from fact_before)
    union all
    select unit, period_start from (select * from fact_before except select * from compared_now)
    union all
    select unit, period_start from (select * from compared_flags_now except select * from flag_before)
    union all
    select unit, period_start from (select * from flag_before except select * from compared_flags_now)
)
select distinct unit, period_start from changed;

-- The episodes with a sample in scope, under the key the sample has now or had before (on an
-- empty layer: every episode).
create or replace temp table audit_episode_touched as
select episode_key from audit_fact_now where episode_key is not null
union
select episode_key from audit_fact_before where episode_key is not null;

delete from audit_sample_fact where sample_id in (select sample_id from audit_layer_scope);
insert into audit_sample_fact select * from audit_fact_now;
delete from audit_sample_flag where sample_id in (select sample_id from audit_layer_scope);
insert into audit_sample_flag select * from audit_flag_now;

-- Re-aggregation of the touched pairs from their facts.
create or replace temp view audit_counts_fresh as
select
    f.unit,
    f.period_start,
    max(f.collected_at) as latest_collected_at,
    count(*) as samples,
    count(distinct f.patient_key) as patients,
    count(*) filter (where f.samples_usable) as samples_usable,
    count(*) filter (where f.samples_caution) as samples_caution,
    count(*) filter (where f.samples_excluded) as samples_excluded,
    count(*) filter (where f.excluded_sample_type) as excluded_sample_type,
    count(*) filter (where f.excluded_data_quality) as excluded_data_quality,
    count(*) filter (where f.arterial) as arterial,
    count(*) filter (where f.fio2_device_documented) as fio2_device_documented,
    count(*) filter (where f.fio2_device_mismatch) as fio2_device_mismatch,
    count(*) filter (where f.age_adult) as age_adult,
    count(*) filter (where f.age_unknown) as age_unknown,
    count(*) filter (where f.age_child) as age_child,
    count(*) filter (where f.age_neonate) as age_neonate,
    count(*) filter (where f.oxygen_assessed) as oxygen_assessed,
    count(*) filter (where f.hypoxaemic) as hypoxaemic,
    count(*) filter (where f.oxygen_unknown) as oxygen_unknown,
    count(*) filter (where f.on_oxygen) as on_oxygen,
    count(*) filter (where f.no_oxygen_documented) as no_oxygen_documented,
    count(*) filter (where f.undocumented_oxygen) as undocumented_oxygen,
    count(*) filter (where f.above_target_on_oxygen) as above_target_on_oxygen,
    count(*) filter (where f.hyperoxaemic_on_oxygen) as hyperoxaemic_on_oxygen,
    count(*) filter (where f.aa_assessed) as aa_assessed,
    count(*) filter (where f.aa_above_limit) as aa_above_limit,
    count(*) filter (where f.pf_assessed) as pf_assessed,
    count(*) filter (where f.pf_severe) as pf_severe,
    count(*) filter (where f.pf_moderate) as pf_moderate,
    count(*) filter (where f.pf_mild) as pf_mild,
    count(*) filter (where f.pf_above_300) as pf_above_300,
    count(*) filter (where f.rx_known) as rx_known,
    count(*) filter (where f.rx_active) as rx_active,
    count(*) filter (where f.rx_not_prescribed) as rx_not_prescribed,
    count(*) filter (where f.rx_with_target) as rx_with_target,
    count(*) filter (where f.rx_target_assessed) as rx_target_assessed,
    count(*) filter (where f.rx_within_target) as rx_within_target,
    count(*) filter (where f.rx_above_target) as rx_above_target,
    count(*) filter (where f.rx_below_target) as rx_below_target,
    count(*) filter (where f.rx_risk_documented) as rx_risk_documented,
    count(*) filter (where f.rx_target_conflicts_risk) as rx_target_conflicts_risk
from audit_sample_fact as f
semi join audit_touched as t on t.unit = f.unit and t.period_start = f.period_start
group by f.unit, f.period_start;

create or replace temp view audit_flags_fresh as
select f.unit, f.period_start, f.rule_id, count(distinct f.sample_id) as flagged
from audit_sample_flag as f
semi join audit_touched as t on t.unit = f.unit and t.period_start = f.period_start
group by f.unit, f.period_start, f.rule_id;

create or replace temp view audit_age_bands_fresh as
select
    f.unit,
    f.period_start,
    f.age_band,
    count(*) filter (where f.oxygen_assessed) as oxygen_assessed,
    count(*) filter (where f.hypoxaemic) as hypoxaemic,
    count(*) filter (where f.on_oxygen) as on_oxygen,
    count(*) filter (where f.above_target_on_oxygen) as above_target_on_oxygen,
    count(*) filter (where f.rx_target_assessed) as rx_target_assessed,
    count(*) filter (where f.rx_within_target) as rx_within_target
from audit_sample_fact as f
semi join audit_touched as t on t.unit = f.unit and t.period_start = f.period_start
where f.age_band is not null
group by f.unit, f.period_start, f.age_band;

create or replace temp view audit_patients_fresh as
select distinct f.unit, f.period_start, f.patient_key
from audit_sample_fact as f
semi join audit_touched as t on t.unit = f.unit and t.period_start = f.period_start
where f.patient_key is not null;

create table if not exists audit_unit_period_counts as select * from audit_counts_fresh with no data;
create table if not exists audit_unit_period_flags as select * from audit_flags_fresh with no data;
create table if not exists audit_unit_period_patients as select * from audit_patients_fresh with no data;
create table if not exists audit_unit_period_age_bands as select * from audit_age_bands_fresh with no data;

delete from audit_unit_period_counts as c
where exists (select 1 from audit_touched as t where t.unit = c.unit and t.period_start = c.period_start);
insert into audit_unit_period_counts select * from audit_counts_fresh;
delete from audit_unit_period_flags as c
where exists (select 1 from audit_touched as t where t.unit = c.unit and t.period_start = c.period_start);
insert into audit_unit_period_flags select * from audit_flags_fresh;
delete from audit_unit_period_patients as c
where exists (select 1 from audit_touched as t where t.unit = c.unit and t.period_start = c.period_start);
insert into audit_unit_period_patients select * from audit_patients_fresh;
delete from audit_unit_period_age_bands as c
where exists (select 1 from audit_touched as t where t.unit = c.unit and t.period_start = c.period_start);
insert into audit_unit_period_age_bands select * from audit_age_bands_fresh;

-- Episodes with a sample in scope, from all their facts: each placed in the unit and period of
-- its first assessed sample (ties: the lowest sample_id), with its first and any-sample outcomes.
create or replace temp table audit_episode_now as
with assessed as (
    select
        episode_key,
        unit,
        period_start,
        collected_at,
        sample_id,
        hypoxaemic,
        on_oxygen,
        above_target_on_oxygen,
        out_of_target_on_oxygen
    from audit_sample_fact
    semi join audit_episode_touched using (episode_key)
    where oxygen_assessed
)
select
    episode_key,
    arg_min(unit, (collected_at, sample_id)) as unit,
    arg_min(period_start, (collected_at, sample_id)) as period_start,
    arg_min(hypoxaemic, (collected_at, sample_id)) as first_hypoxaemic,
    bool_or(hypoxaemic) as any_hypoxaemic,
    bool_or(on_oxygen) as any_on_oxygen,
    bool_or(above_target_on_oxygen) as any_above_target,
    bool_or(out_of_target_on_oxygen) as any_out_of_target
from assessed
group by episode_key;

create table if not exists audit_episode as select * from audit_episode_now with no data;

-- The (unit, period) pairs of those episodes, where they were placed before and are now.
create or replace temp table audit_episode_pairs as
select unit, period_start from audit_episode
semi join audit_episode_touched using (episode_key)
union
select unit, period_start from audit_episode_now;

delete from audit_episode where episode_key in (select episode_key from audit_episode_touched);
insert into audit_episode select * from audit_episode_now;

create or replace temp view audit_episodes_fresh as
select
    e.unit,
    e.period_start,
    count(*) as episodes,
    count(*) filter (where e.first_hypoxaemic) as episodes_first_hypoxaemic,
    count(*) filter (where e.any_hypoxaemic) as episodes_any_hypoxaemic,
    count(*) filter (where e.any_on_oxygen) as episodes_on_oxygen,
    count(*) filter (where e.any_on_oxygen and e.any_above_target) as episodes_any_above_target,
    count(*) filter (where e.any_on_oxygen and e.any_out_of_target) as episodes_any_out_of_target
from audit_episode as e
semi join audit_episode_pairs as t on t.unit = e.unit and t.period_start = e.period_start
group by e.unit, e.period_start;

create table if not exists audit_unit_period_episodes as select * from audit_episodes_fresh with no data;
delete from audit_unit_period_episodes as c
where exists (select 1 from audit_episode_pairs as t where t.unit = c.unit and t.period_start = c.period_start);
insert into audit_unit_period_episodes select * from audit_episodes_fresh;

drop view audit_counts_fresh;
drop view audit_flags_fresh;
drop view audit_patients_fresh;
drop view audit_age_bands_fresh;
drop view audit_episodes_fresh;
drop table audit_fact_now;
drop table audit_flag_now;
drop table audit_touched;
drop table audit_fact_before;
drop table audit_episode_touched;
drop table audit_episode_now;
drop table audit_episode_pairs;
drop table audit_layer_scope;

-- Which runs' analyses the layer holds, and the settings it was built with.
create table if not exists audit_layer_runs (run_id varchar);
insert into audit_layer_runs
select run_id from runs
where analysed_at is not null and run_id not in (select run_id from audit_layer_runs);
create table if not exists audit_layer_state (settings_sha256 varchar);
delete from audit_layer_state;
insert into audit_layer_state values ($layer_sha256);
