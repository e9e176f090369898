-- Published: p-chart of every rate of audit_measure over the periods of each unit (and of
-- all units), with varying subgroup size n_i:
--   centre   p_bar = sum(x) / sum(n) over the reporting window (the unit's all-periods cell);
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
-- Signals are computed on the true counts; a point whose rate is suppressed is published
-- without its rate, limits and signals, and a series whose centre is suppressed without
-- centre, limits and signals.
-- Grain: one row per measure, unit (or all units) and period with a denominator above zero.
create or replace table audit_control_chart as
with series as (
    select
        m.sort_order,
        m.measure,
        m.title,
        x.unit,
        x.period_start,
        cast(x.value as double) as x,
        cast(n.value as double) as n,
        x.hidden or n.hidden as point_hidden,
        n.hidden as n_hidden
    from audit_measure as m
    join audit_cell as x on x.family = m.numerator_family and x.period_start is not null
    join audit_cell as n
        on n.family = m.denominator_family
       and n.unit is not distinct from x.unit
       and n.period_start = x.period_start
    where n.value > 0
),
centre as (
    select
        m.measure,
        x.unit,
        cast(x.value as double) / n.value as p_bar,
        x.hidden or n.hidden as centre_hidden
    from audit_measure as m
    join audit_cell as x on x.family = m.numerator_family and x.period_start is null
    join audit_cell as n
        on n.family = m.denominator_family
       and n.unit is not distinct from x.unit
       and n.period_start is null
    where n.value > 0
),
points as (
    select
        s.*,
        c.p_bar,
        c.centre_hidden,
        s.x / s.n as p,
        standardised_proportion(s.x / s.n, c.p_bar, s.n) as z,
        row_number() over (partition by s.measure, s.unit order by s.period_start) as seq
    from series as s
    join centre as c on c.measure = s.measure and c.unit is not distinct from s.unit
),
moving as (
    select
        *,
        abs(z - lag(z) over (partition by measure, unit order by period_start)) as moving_range,
        p - lag(p) over (partition by measure, unit order by period_start) as step
    from points
),
limits as (
    select
        *,
        laney_sigma_z(avg(moving_range) over (partition by measure, unit)) as sigma_z,
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
        seq - row_number() over (partition by measure, unit, side order by period_start) as side_group,
        seq - row_number() over (partition by measure, unit, direction order by period_start) as direction_group
    from limits
),
runs as (
    select
        *,
        count(*) over (partition by measure, unit, side, side_group) as side_run,
        count(*) over (partition by measure, unit, direction, direction_group) as direction_run
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
        trend_step or coalesce(lead(trend_step) over (partition by measure, unit order by period_start), false)
            as in_trend
    from signals
)
select
    k.sort_order,
    k.measure,
    k.title,
    coalesce(k.unit, 'All units') as unit,
    k.unit is null as all_units,
    p.period,
    k.period_start,
    case when not k.n_hidden then cast(k.n as bigint) end as denominator,
    case when not k.point_hidden then k.p end as rate,
    case when not k.centre_hidden then k.p_bar end as centre,
    case when not k.centre_hidden and not k.n_hidden then k.lcl end as lower_limit,
    case when not k.centre_hidden and not k.n_hidden then k.ucl end as upper_limit,
    case when not k.centre_hidden then k.sigma_z end as laney_sigma_z,
    case when not k.centre_hidden and not k.n_hidden then k.laney_lcl end as laney_lower_limit,
    case when not k.centre_hidden and not k.n_hidden then k.laney_ucl end as laney_upper_limit,
    case when not k.point_hidden and not k.centre_hidden then k.beyond_limits end as beyond_limits,
    case when not k.point_hidden and not k.centre_hidden then k.in_shift end as in_shift,
    case when not k.point_hidden and not k.centre_hidden then k.in_trend end as in_trend,
    case when not k.point_hidden and not k.centre_hidden then
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
order by k.sort_order, all_units, unit, k.period_start;
