-- Published: patient-based quality control per analyser and analyte (from analyser_qc,
-- blocks of consecutive patient results): how many blocks, how many had a median outside
-- the analyser's own limits, the latest such block and the largest shift.
-- Grain: one row per analyser and analyte with at least one complete block.
create or replace table audit_analyser_qc as
select
    analyser_id,
    analyte,
    count(*) as blocks,
    sum(case when signal then 1 else 0 end) as blocks_outside_limits,
    max(centre) as centre,
    max(lower_limit) as lower_limit,
    max(upper_limit) as upper_limit,
    cast(max(case when signal then last_collected_at end) as date) as latest_signal_day,
    max(case when signal then abs(shift) end) as largest_shift,
    max(case when block = last_block then block_median end) as latest_block_median
from (
    select *, max(block) over (partition by analyser_id, analyte) as last_block
    from analyser_qc
) as q
group by analyser_id, analyte
order by blocks_outside_limits desc, analyser_id, analyte;
