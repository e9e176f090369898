-- Published: p-chart of every rate of audit_measure over the periods of each unit, of all
-- units of each unit type and of all units, with varying subgroup size n_i:
--   centre   p_bar = sum(x) / sum(n) over the complete periods of the reporting window;
--   limits   p_bar -/+ $sigma * sqrt(p_bar (1 - p_bar) / n_i), clipped to [0, 1]
--            (proportion_lower_limit / proportion_upper_limit);
--   Laney p' limits (same, sigma scaled by sigma_z = mean moving range of z_i / 1.128), shown
--   beside them; $chart_limits ('p_chart' or 'laney') chooses the limits the signals use.
-- Special-cause signals, each a parameter:
--   beyond_limits  a point outside the limits ($sigma sigma);
--   shift          a run of $shift_run or more consecutive points on the same side of the
--                  centre line (a point on the line ends a run);
--   trend          $trend_run or more consecutive points each higher (or each lower) than the
--                  one before (a tie ends the trend).
-- The period still under way (audit_window.partial, shown by default) is drawn, marked
-- partial, with its rate and its limits, but not judged: its beyond_limits, in_shift and
-- in_trend are NULL, it takes no part in the runs or the Laney moving ranges, and its counts
-- are left out of the centre. A few days of a month are a small sample of an unfinished
-- period: its rate swings by chance alone, and the normal approximation behind the limits is
-- poor at small n, so it would raise shifts, trends and limit breaches nobody should act on.
-- The centre of the complete periods is (all periods - partial period), published only when
-- it follows from shown counts (both of those cells shown, or every complete period's cell
-- shown), or it would give the difference of a hidden count away; otherwise the centre is the
-- whole window's (the all-periods cell, as published in audit_rates), and centre_basis says so.
-- Signals are computed on the true counts; a point whose rate is suppressed is published
-- without its rate, limits and signals, and a series whose centre is suppressed without
-- centre, limits and signals.
-- Grain: one row per measure, place (unit, all units of a type, or all units) and period with
-- a denominator above zero.
create or replace table audit_control_chart as
with series as (
    select
        m.sort_order,
        m.measure,
        m.title,
        x.unit,
        x.unit_type,
        x.unit_label,
        x.period_start,
        w.partial,
        cast(x.value as double) as x,
        cast(n.value as double) as n,
        x.hidden or n.hidden as point_hidden,
        n.hidden as n_hidden
    from audit_measure as m
    join audit_cell as x on x.family = m.numerator_family and x.period_start is not null
    join audit_cell as n
        on n.family = m.denominator_family
       and n.unit is not distinct from x.unit
       and n.unit_type is not distinct from x.unit_type
       and n.period_start = x.period_start
    join audit_window as w on w.period_start = x.period_start
    where n.value > 0
),
period_cells as (
    -- numerator and denominator cells of every period, with or without a denominator
    select
        m.measure,
        x.unit,
        x.unit_type,
        x.period_start,
        coalesce(w.partial, false) as partial,
        x.value as x,
        n.value as n,
        x.hidden as x_hidden,
        n.hidden as n_hidden
    from audit_measure as m
    join audit_cell as x on x.family = m.numerator_family
    join audit_cell as n
        on n.family = m.denominator_family
       and n.unit is not distinct from x.unit
       and n.unit_type is not distinct from x.unit_type
       and n.period_start is not distinct from x.period_start
    left join audit_window as w on w.period_start = x.period_start
),
centre_counts as (
    select
        measure,
        unit,
        unit_type,
        max(case when period_start is null then x end) as x_all,
        max(case when period_start is null then n end) as n_all,
        bool_or(period_start is null and (x_hidden or n_hidden)) as all_hidden,
        coalesce(sum(case when partial then x end), 0) as x_partial,
        coalesce(sum(case when partial then n end), 0) as n_partial,
        -- the complete periods' sums follow from shown cells: whole window less the partial
        -- period, both shown; or each complete period shown
        (not bool_or(period_start is null and x_hidden) and not bool_or(partial and x_hidden))
            or not bool_or(period_start is not null and not partial and x_hidden) as x_complete_shown,
        (not bool_or(period_start is null and n_hidden) and not bool_or(partial and n_hidden))
            or not bool_or(period_start is not null and not partial and n_hidden) as n_complete_shown
    from period_cells
    group by measure, unit, unit_type
),
centre as (
    select
        measure,
        unit,
        unit_type,
        case
            when n_all - n_partial > 0 and x_complete_shown and n_complete_shown
                then cast(x_all - x_partial as double) / (n_all - n_partial)
            when n_all > 0 then cast(x_all as double) / n_all
        end as p_bar,
        case
            when n_all - n_partial > 0 and x_complete_shown and n_complete_shown then false
            else all_hidden
        end as centre_hidden,
        case
            when n_all - n_partial > 0 and x_complete_shown and n_complete_shown then 'complete periods'
            else 'all periods, the partial one included'
        end as centre_basis
    from centre_counts
    where n_all > 0
),
points as (
    select
        s.*,
        c.p_bar,
        c.centre_hidden,
        c.centre_basis,
        s.x / s.n as p,
        standardised_proportion(s.x / s.n, c.p_bar, s.n) as z,
        -- the partial point is numbered apart, so it joins no run of the complete points
        row_number() over (partition by s.measure, s.unit, s.unit_type, s.partial order by s.period_start) as seq
    from series as s
    join centre as c
        on c.measure = s.measure
       and c.unit is not distinct from s.unit
       and c.unit_type is not distinct from s.unit_type
),
moving as (
    select
        *,
        abs(z - lag(z) over (partition by measure, unit, unit_type, partial order by period_start)) as moving_range,
        p - lag(p) over (partition by measure, unit, unit_type, partial order by period_start) as step
    from points
),
limits as (
    select
        *,
        laney_sigma_z(avg(moving_range) over (partition by measure, unit, unit_type)) as sigma_z,
        case when p > p_bar then 1 when p < p_bar then -1 else 0 end as side,
        case when step > 0 then 1 when step < 0 then -1 else 0 end as direction
    from moving
),
limited as (
    select
        *,
        proportion_lower_limit(p_bar, n, $sigma) as lcl,
        proportion_upper_limit(p_bar, n, $sigma) as ucl,
        proportion_lower_limit(p_bar, n, $sigma, sigma_z) as laney_lcl,
        proportion_upper_limit(p_bar, n, $sigma, sigma_z) as laney_ucl,
        seq - row_number() over (partition by measure, unit, unit_type, partial, side order by period_start)
            as side_group,
        seq - row_number() over (partition by measure, unit, unit_type, partial, direction order by period_start)
            as direction_group
    from limits
),
runs as (
    select
        *,
        count(*) over (partition by measure, unit, unit_type, partial, side, side_group) as side_run,
        count(*) over (partition by measure, unit, unit_type, partial, direction, direction_group) as direction_run
    from limited
),
signals as (
    select
        *,
        case when $chart_limits = 'laney' then p < laney_lcl or p > laney_ucl else p < lcl or p > ucl end
            as beyond_limits,
        side <> 0 and side_run >= $shift_run as in_shift,
        -- a trend of N points is N - 1 consecutive steps in one direction; the point before the
        -- first step belongs to it too
        direction <> 0 and direction_run >= $trend_run - 1 as trend_step
    from runs
),
marked as (
    select
        *,
        trend_step or coalesce(
            lead(trend_step) over (partition by measure, unit, unit_type, partial order by period_start), false
        ) as in_trend
    from signals
)
select
    k.sort_order,
    k.measure,
    k.title,
    k.unit_label as unit,
    k.unit_type,
    k.unit is null as all_units,
    p.period,
    k.period_start,
    k.partial,
    case when not k.n_hidden then cast(k.n as bigint) end as denominator,
    case when not k.point_hidden then k.p end as rate,
    case when not k.centre_hidden then k.p_bar end as centre,
    k.centre_basis,
    case when not k.centre_hidden and not k.n_hidden then k.lcl end as lower_limit,
    case when not k.centre_hidden and not k.n_hidden then k.ucl end as upper_limit,
    case when not k.centre_hidden then k.sigma_z end as laney_sigma_z,
    case when not k.centre_hidden and not k.n_hidden then k.laney_lcl end as laney_lower_limit,
    case when not k.centre_hidden and not k.n_hidden then k.laney_ucl end as laney_upper_limit,
    case when not k.point_hidden and not k.centre_hidden and not k.partial then k.beyond_limits end as beyond_limits,
    case when not k.point_hidden and not k.centre_hidden and not k.partial then k.in_shift end as in_shift,
    case when not k.point_hidden and not k.centre_hidden and not k.partial then k.in_trend end as in_trend,
    case when not k.point_hidden and not k.centre_hidden and not k.partial then
        nullif(concat_ws(', ',
            case when k.beyond_limits then 'beyond limits' end,
            case when k.in_shift then 'shift' end,
            case when k.in_trend then 'trend' end), '')
    end as signals,
    nullif(concat_ws(', ',
        case when k.n_hidden then 'denominator' end,
        case when k.point_hidden then 'rate' end,
        case when k.centre_hidden then 'centre, laney_sigma_z' end,
        case when k.centre_hidden or k.n_hidden then 'lower_limit, upper_limit, laney_lower_limit, laney_upper_limit' end,
        case when k.point_hidden or k.centre_hidden then 'beyond_limits, in_shift, in_trend, signals' end
    ), '') as suppressed_columns
from marked as k
join audit_period as p on p.period_start = k.period_start
order by k.sort_order, all_units, k.unit_type nulls last, k.unit_label, k.period_start;
