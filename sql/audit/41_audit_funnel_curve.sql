-- Published: the funnel limits of audit_funnel as curves over volume, for drawing: 60
-- volumes spaced evenly on a log scale from half the smallest to 1.2 x the largest unit
-- denominator.
-- Grain: one row per measure and volume. Not drawn when the overall rate is suppressed.
create or replace table audit_funnel_curve as
with spans as (
    select
        measure,
        max(overall_rate) as p_bar,
        max(denominator) as largest,
        greatest(1, min(denominator) / 2.0) as smallest
    from audit_funnel
    where overall_rate is not null
    group by measure
),
grid as (
    select distinct
        s.measure,
        s.p_bar,
        cast(round(exp(ln(s.smallest) + (ln(1.2 * s.largest) - ln(s.smallest)) * g.i / 59.0)) as bigint) as volume
    from spans as s
    cross join generate_series(0, 59) as g(i)
    where s.largest is not null
)
select
    measure,
    volume,
    p_bar as overall_rate,
    proportion_lower_limit(p_bar, volume, 1.959963984540054) as lower_95,
    proportion_upper_limit(p_bar, volume, 1.959963984540054) as upper_95,
    proportion_lower_limit(p_bar, volume, 3.090232306167813) as lower_998,
    proportion_upper_limit(p_bar, volume, 3.090232306167813) as upper_998
from grid
order by measure, volume;
