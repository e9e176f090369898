-- Published: the funnel limits of audit_funnel as curves over volume, for drawing, one funnel
-- per measure and unit type: its centre line (the type's rate), widened for over-dispersion
-- exactly as the units' limits are (the same overdispersion, phi and tau2, funnel_lower_limit /
-- funnel_upper_limit). 60 volumes spaced evenly on a log scale from half the smallest to
-- 1.2 x the largest shown denominator of the type's units.
-- Grain: one row per measure, unit type and volume. Not drawn when the type's rate is
-- suppressed, nor when none of its units' denominators is shown.
create or replace table audit_funnel_curve as
with spans as (
    -- audit_funnel repeats the type's centre and estimates on each of its units' rows
    select
        sort_order,
        measure,
        unit_type,
        any_value(overall_rate) as p0,
        any_value(overdispersion) as overdispersion,
        any_value(phi) as phi,
        any_value(tau2) as tau2,
        max(denominator) as largest,
        greatest(1, min(denominator) / 2.0) as smallest
    from audit_funnel
    where overall_rate is not null
    group by sort_order, measure, unit_type
),
grid as (
    select distinct
        s.*,
        cast(round(exp(ln(s.smallest) + (ln(1.2 * s.largest) - ln(s.smallest)) * g.i / 59.0)) as bigint) as volume
    from spans as s
    cross join generate_series(0, 59) as g(i)
    where s.largest is not null
)
select
    measure,
    unit_type,
    volume,
    p0 as overall_rate,
    overdispersion,
    phi,
    tau2,
    funnel_lower_limit(p0, volume, 1.959963984540054, overdispersion, phi, tau2) as lower_95,
    funnel_upper_limit(p0, volume, 1.959963984540054, overdispersion, phi, tau2) as upper_95,
    funnel_lower_limit(p0, volume, 3.090232306167813, overdispersion, phi, tau2) as lower_998,
    funnel_upper_limit(p0, volume, 3.090232306167813, overdispersion, phi, tau2) as upper_998
from grid
order by sort_order, measure, unit_type, volume;
