-- Published: funnel plot of every rate of audit_measure, comparing units by volume over the
-- whole reporting window: each unit's rate against the overall rate of all units, with
-- 95 % and 99.8 % limits for its denominator (normal approximation to the binomial,
-- proportion_lower_limit / proportion_upper_limit with z 1.96 and 3.09).
-- Grain: one row per measure and unit with a denominator above zero.
create or replace table audit_funnel as
with unit_rates as (
    select
        m.sort_order,
        m.measure,
        m.title,
        x.unit,
        x.value as x,
        n.value as n,
        x.hidden as x_hidden,
        n.hidden as n_hidden
    from audit_measure as m
    join audit_cell as x on x.family = m.numerator_family and x.period_start is null and x.unit is not null
    join audit_cell as n
        on n.family = m.denominator_family
       and n.unit = x.unit
       and n.period_start is null
    where n.value > 0
),
overall as (
    select
        m.measure,
        cast(x.value as double) / n.value as p_bar,
        x.hidden or n.hidden as overall_hidden
    from audit_measure as m
    join audit_cell as x on x.family = m.numerator_family and x.period_start is null and x.unit is null
    join audit_cell as n on n.family = m.denominator_family and n.period_start is null and n.unit is null
    where n.value > 0
),
placed as (
    select
        u.*,
        o.p_bar,
        o.overall_hidden,
        cast(u.x as double) / u.n as p,
        proportion_lower_limit(o.p_bar, u.n, 1.959963984540054) as lower_95,
        proportion_upper_limit(o.p_bar, u.n, 1.959963984540054) as upper_95,
        proportion_lower_limit(o.p_bar, u.n, 3.090232306167813) as lower_998,
        proportion_upper_limit(o.p_bar, u.n, 3.090232306167813) as upper_998
    from unit_rates as u
    join overall as o on o.measure = u.measure
)
select
    sort_order,
    measure,
    title,
    unit,
    case when not x_hidden then x end as numerator,
    case when not n_hidden then n end as denominator,
    case when not x_hidden and not n_hidden then p end as rate,
    case when not overall_hidden then p_bar end as overall_rate,
    case when not overall_hidden and not n_hidden then lower_95 end as lower_95,
    case when not overall_hidden and not n_hidden then upper_95 end as upper_95,
    case when not overall_hidden and not n_hidden then lower_998 end as lower_998,
    case when not overall_hidden and not n_hidden then upper_998 end as upper_998,
    case
        when x_hidden or n_hidden or overall_hidden then null
        when p > upper_998 then 'above 99.8 % limit'
        when p > upper_95 then 'above 95 % limit'
        when p < lower_998 then 'below 99.8 % limit'
        when p < lower_95 then 'below 95 % limit'
        else 'within limits'
    end as position,
    nullif(concat_ws(', ',
        case when x_hidden then 'numerator' end,
        case when n_hidden then 'denominator' end,
        case when x_hidden or n_hidden then 'rate' end,
        case when overall_hidden then 'overall_rate' end,
        case when overall_hidden or n_hidden then 'lower_95, upper_95, lower_998, upper_998' end,
        case when x_hidden or n_hidden or overall_hidden then 'position' end
    ), '') as suppressed_columns
from placed
order by sort_order, unit;
