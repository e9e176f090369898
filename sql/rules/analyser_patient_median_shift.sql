-- Patient-based QC per analyser: medians of blocks of $block_size consecutive arterial
-- results (by collection time, then sample id) for PaCO2 and pH, against limits from the
-- analyser's own block medians: centre = median, spread = 1.4826 x median absolute
-- deviation (a robust standard deviation), limits = centre +/- $limit_sigma x spread.
--
-- Incremental: complete blocks are kept in analyser_qc_blocks. A run renumbers an
-- analyser's results only from the first block that a result loaded, corrected or replaced
-- in this run (scope_runs) falls into - every block before it holds exactly the results it
-- held - and a rebuild renumbers them all. Limits and signals are then recomputed from the
-- block medians, one row per block, so a nightly run costs what its new results cost.
-- Grain of analyser_qc: one row per analyser, analyte and complete block.

create table if not exists analyser_qc_blocks (
    analyser_id varchar,
    analyte varchar,
    block bigint,
    first_collected_at timestamp,
    first_sample_id varchar,
    last_collected_at timestamp,
    last_sample_id varchar,
    block_median double
);

delete from analyser_qc_blocks where (select rebuild from scope_settings);

-- Per analyser and analyte: the first block to renumber, and the last result before it.
create or replace temp table qc_restart as
with changed as (
    select analyser_id, min(collected_at) as since
    from (
        select analyser_id, collected_at from records
        where run_id in (select run_id from scope_runs)
        union all
        select analyser_id, collected_at from superseded_records
        where superseded_in_run in (select run_id from scope_runs)
        union all
        select distinct analyser_id, null::timestamp from records
        where (select rebuild from scope_settings)
    ) as results
    where analyser_id is not null
    group by analyser_id
),
targets as (
    select c.analyser_id, a.analyte, c.since
    from changed as c
    cross join (values ('paco2_mmhg'), ('ph')) as a(analyte)
),
starts as (
    select
        t.analyser_id,
        t.analyte,
        case
            when (select rebuild from scope_settings) then 0
            else coalesce(min(b.block) filter (where b.last_collected_at >= t.since), max(b.block) + 1, 0)
        end as start_block
    from targets as t
    left join analyser_qc_blocks as b using (analyser_id, analyte)
    group by t.analyser_id, t.analyte, t.since
)
select s.analyser_id, s.analyte, s.start_block, p.last_collected_at as after_collected_at, p.last_sample_id as after_sample_id
from starts as s
left join analyser_qc_blocks as p
    on p.analyser_id = s.analyser_id and p.analyte = s.analyte and p.block = s.start_block - 1;

delete from analyser_qc_blocks as b
using qc_restart as r
where b.analyser_id = r.analyser_id and b.analyte = r.analyte and b.block >= r.start_block;

-- The results to number, numbered per analyser and analyte, kept as a table: DuckDB 2.0
-- aggregates medians straight off a window's output far more slowly than off a table
-- (the network run's 5 M-record lake: 231 s as one statement, 21 s as these two).
create or replace temp table qc_numbered as
with results as (
    select
        r.analyser_id,
        q.analyte,
        q.start_block,
        r.collected_at,
        r.sample_id,
        case q.analyte when 'paco2_mmhg' then r.paco2_mmhg else r.ph end as value
    from records as r
    join qc_restart as q using (analyser_id)
    where r.sample_type = 'arterial'
      and r.collected_at is not null
      -- skips the unchanged history early (zone maps) unless some analyser starts from its first block
      and ((select bool_or(after_collected_at is null) from qc_restart)
           or r.collected_at >= (select min(after_collected_at) from qc_restart))
      and (q.after_collected_at is null
           or r.collected_at > q.after_collected_at
           or (r.collected_at = q.after_collected_at and r.sample_id > q.after_sample_id))
)
select
    *,
    row_number() over (partition by analyser_id, analyte order by collected_at, sample_id) - 1 as position
from results
where value is not null;

insert into analyser_qc_blocks
select
    analyser_id,
    analyte,
    start_block + position // $block_size as block,
    max(case when position % $block_size = 0 then collected_at end) as first_collected_at,
    max(case when position % $block_size = 0 then sample_id end) as first_sample_id,
    max(case when position % $block_size = $block_size - 1 then collected_at end) as last_collected_at,
    max(case when position % $block_size = $block_size - 1 then sample_id end) as last_sample_id,
    median(value) as block_median
from qc_numbered
group by analyser_id, analyte, start_block + position // $block_size
having count(*) = $block_size;

drop table qc_numbered;

create or replace table analyser_qc as
with limits as (
    select
        analyser_id,
        analyte,
        median(block_median) as centre,
        1.4826 * mad(block_median) as spread
    from analyser_qc_blocks
    group by analyser_id, analyte
)
select
    b.analyser_id,
    b.analyte,
    b.block,
    b.first_collected_at,
    b.last_collected_at,
    b.block_median,
    l.centre,
    l.centre - $limit_sigma * l.spread as lower_limit,
    l.centre + $limit_sigma * l.spread as upper_limit,
    b.block_median - l.centre as shift,
    b.block_median not between l.centre - $limit_sigma * l.spread and l.centre + $limit_sigma * l.spread as signal
from analyser_qc_blocks as b
join limits as l using (analyser_id, analyte);
