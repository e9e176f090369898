-- Patient-based QC per analyser: medians of blocks of $block_size consecutive arterial
-- results (by collection time) for PaCO2 and pH, against limits from the analyser's own
-- block medians: centre = median, spread = 1.4826 x median absolute deviation (a robust
-- standard deviation), limits = centre +/- $limit_sigma x spread.
-- Grain: one row per analyser, analyte and complete block. Rebuilt over the whole store.
create or replace table analyser_qc as
with results as (
    select analyser_id, collected_at, sample_id, 'paco2_mmhg' as analyte, paco2_mmhg as value
    from records
    where analyser_id is not null and sample_type = 'arterial' and paco2_mmhg is not null
    union all
    select analyser_id, collected_at, sample_id, 'ph' as analyte, ph as value
    from records
    where analyser_id is not null and sample_type = 'arterial' and ph is not null
),
numbered as (
    select
        *,
        (row_number() over (partition by analyser_id, analyte order by collected_at, sample_id) - 1)
            // $block_size as block
    from results
),
blocks as (
    select
        analyser_id,
        analyte,
        block,
        min(collected_at) as first_collected_at,
        max(collected_at) as last_collected_at,
        median(value) as block_median
    from numbered
    group by analyser_id, analyte, block
    having count(*) = $block_size
),
limits as (
    select
        analyser_id,
        analyte,
        median(block_median) as centre,
        1.4826 * mad(block_median) as spread
    from blocks
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
from blocks as b
join limits as l using (analyser_id, analyte);
