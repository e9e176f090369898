-- Published: funnel plot of every rate of audit_measure, comparing units by volume over the
-- whole reporting window. A unit is compared with units like it: the centre line p0 is the
-- rate of all units of its type (audit_cell, unit NULL and unit_type T; when the site has one
-- type only, audit_cell has no type level and the site's rate is that type's rate), and the
-- 95 % and 99.8 % limits (z 1.959963984540054 and 3.090232306167813) allow for between-unit
-- variation beyond chance, after Spiegelhalter DJ 2005, "Handling over-dispersion of
-- performance indicators", Qual Saf Health Care 14:347-351 (details from memory):
--   1. per unit type and measure, each unit's z-score against p0, z_i = (y_i - p0) / s_i with
--      s_i^2 = p0 (1 - p0) / n_i (standardised_proportion);
--   2. the z-scores winsorised at $winsorize_pct percent each side (winsorised_count), so that
--      the few extreme units the plot is meant to show do not widen their own limits;
--   3. phi = sum z_i^2 / I (overdispersion_phi) and the additive between-unit variance
--      tau^2 = max(0, (I phi - (I - 1)) / (sum w - sum w^2 / sum w)), w_i = 1 / s_i^2
--      (overdispersion_tau2);
--   4. limits p0 -/+ z * funnel_sigma: $funnel_overdispersion = 'additive' sqrt(s_i^2 + tau^2),
--      'multiplicative' s_i * sqrt(phi) when phi > 1, 'none' s_i (the normal approximation to
--      the binomial, as before the over-dispersion was allowed for).
-- Fewer than min_units (5) units with counts shown in a type: over-dispersion is not estimated
-- and the limits are binomial ('none', said in overdispersion_note). Why 5: phi is a mean of I
-- squared z-scores on about I - 1 degrees of freedom, so with 4 units its relative standard
-- error is about sqrt(2 / 3) = 80 % (chi-squared variance 2 df), and winsorising 10 % of fewer
-- than 10 units pulls in none: one unusual unit would set phi alone and hide itself inside the
-- limits it widened. A type rate of 0 or 1 has no binomial spread, hence no z-scores either.
-- Suppression: the estimate uses only the units whose numerator and denominator are both shown
-- (and only when the type's rate is shown), so phi, tau2 and every limit are functions of
-- published counts and give no hidden count away; a unit with a hidden count is left out of
-- the estimate (and of units_in_estimate) but still placed when its own counts allow. Using
-- every unit and rounding phi/tau2 would not do: the limits published beside them, at full
-- precision, give tau2 back exactly, and with it a sum of squares of hidden counts that, with
-- the type's total, can pin two hidden cells down.
-- phi and tau2 are shown whenever estimated, also when the setting is 'none' (they tell how
-- far the binomial limits understate the spread); overdispersion says which one widened the
-- limits.
-- Grain: one row per measure and unit with a denominator above zero.
create or replace table audit_funnel as
with settings as (
    select 5 as min_units
),
unit_rates as (
    select
        m.sort_order,
        m.measure,
        m.title,
        x.unit,
        x.unit_type,
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
place_cells as (
    -- the type level when audit_cell has one; otherwise every unit is of the one type and the
    -- site row is its total
    select family, unit_type, value, hidden
    from audit_cell
    where unit is null and period_start is null and unit_type is not null
    union all
    select s.family, t.unit_type, s.value, s.hidden
    from audit_cell as s
    cross join (select distinct unit_type from audit_cell where unit is not null) as t
    where s.unit is null and s.unit_type is null and s.period_start is null
      and not exists (select 1 from audit_cell where unit is null and unit_type is not null)
),
centre as (
    select
        m.measure,
        x.unit_type,
        cast(x.value as double) / n.value as p0,
        x.hidden or n.hidden as centre_hidden
    from audit_measure as m
    join place_cells as x on x.family = m.numerator_family
    join place_cells as n on n.family = m.denominator_family and n.unit_type = x.unit_type
    where n.value > 0
),
scored as (
    select
        u.*,
        c.p0,
        coalesce(c.centre_hidden, false) as centre_hidden,
        cast(u.x as double) / u.n as p,
        standardised_proportion(cast(u.x as double) / u.n, c.p0, u.n) as z,
        funnel_weight(c.p0, u.n) as w,
        count(*) over (partition by u.measure, u.unit_type) as units_in_type
    from unit_rates as u
    left join centre as c on c.measure = u.measure and c.unit_type = u.unit_type
),
estimating as (
    select
        measure,
        unit_type,
        z,
        w,
        row_number() over (partition by measure, unit_type order by z) as z_rank,
        count(*) over (partition by measure, unit_type) as units
    from scored
    where not x_hidden and not n_hidden and not centre_hidden and z is not null
),
winsor_bounds as (
    -- scipy.stats.mstats.winsorize: the lowest `cut` values take the (cut + 1)-th lowest, the
    -- highest `cut` the (cut + 1)-th highest; clamping every z to those two is the same thing
    select
        *,
        min(case when z_rank = winsorised_count(units, $winsorize_pct) + 1 then z end)
            over (partition by measure, unit_type) as z_low,
        min(case when z_rank = units - winsorised_count(units, $winsorize_pct) then z end)
            over (partition by measure, unit_type) as z_high
    from estimating
),
dispersion as (
    select
        measure,
        unit_type,
        count(*) as units_in_estimate,
        sum(least(greatest(z, z_low), z_high) ^ 2) as sum_z2,
        sum(w) as sum_w,
        sum(w ^ 2) as sum_w2
    from winsor_bounds
    group by measure, unit_type
),
estimated as (
    select
        d.measure,
        d.unit_type,
        d.units_in_estimate,
        case when d.units_in_estimate >= s.min_units then overdispersion_phi(d.sum_z2, d.units_in_estimate) end
            as phi,
        case when d.units_in_estimate >= s.min_units then
            overdispersion_tau2(d.sum_z2, d.units_in_estimate, d.sum_w, d.sum_w2)
        end as tau2
    from dispersion as d
    cross join settings as s
),
method as (
    select
        c.*,
        coalesce(e.units_in_estimate, 0) as units_in_estimate,
        e.phi,
        e.tau2,
        case when $funnel_overdispersion <> 'none' and e.phi is not null then $funnel_overdispersion else 'none' end
            as overdispersion,
        case
            when c.centre_hidden then 'type rate suppressed: no centre line, limits or estimate'
            when c.p0 is null then 'no rate for the unit type'
            when c.p0 in (0.0, 1.0) then 'type rate ' || cast(cast(c.p0 as integer) as varchar)
                || ': no binomial spread to compare units with'
            when e.phi is null then 'fewer than ' || cast(s.min_units as varchar)
                || ' units of this type with counts shown: over-dispersion not estimated, binomial limits'
            when $funnel_overdispersion = 'none' then 'over-dispersion estimated but not applied (setting none)'
            when $funnel_overdispersion = 'multiplicative' and e.phi <= 1.0 then 'phi at most 1: limits not widened'
            when $funnel_overdispersion = 'additive' and e.tau2 = 0.0 then 'tau2 0: limits not widened'
            else 'limits widened for over-dispersion (' || $funnel_overdispersion || ')'
        end as overdispersion_note
    from scored as c
    cross join settings as s
    left join estimated as e on e.measure = c.measure and e.unit_type = c.unit_type
),
placed as (
    select
        *,
        funnel_lower_limit(p0, n, 1.959963984540054, overdispersion, phi, tau2) as lower_95,
        funnel_upper_limit(p0, n, 1.959963984540054, overdispersion, phi, tau2) as upper_95,
        funnel_lower_limit(p0, n, 3.090232306167813, overdispersion, phi, tau2) as lower_998,
        funnel_upper_limit(p0, n, 3.090232306167813, overdispersion, phi, tau2) as upper_998
    from method
)
select
    sort_order,
    measure,
    title,
    unit_type,
    unit,
    case when not x_hidden then x end as numerator,
    case when not n_hidden then n end as denominator,
    case when not x_hidden and not n_hidden then p end as rate,
    case when not centre_hidden then p0 end as overall_rate,
    overdispersion,
    phi,
    tau2,
    units_in_type,
    units_in_estimate,
    case when not centre_hidden and not n_hidden then lower_95 end as lower_95,
    case when not centre_hidden and not n_hidden then upper_95 end as upper_95,
    case when not centre_hidden and not n_hidden then lower_998 end as lower_998,
    case when not centre_hidden and not n_hidden then upper_998 end as upper_998,
    case
        when x_hidden or n_hidden or centre_hidden or upper_998 is null then null
        when p > upper_998 then 'above 99.8 % limit'
        when p > upper_95 then 'above 95 % limit'
        when p < lower_998 then 'below 99.8 % limit'
        when p < lower_95 then 'below 95 % limit'
        else 'within limits'
    end as position,
    overdispersion_note,
    nullif(concat_ws(', ',
        case when x_hidden then 'numerator' end,
        case when n_hidden then 'denominator' end,
        case when x_hidden or n_hidden then 'rate' end,
        case when centre_hidden then 'overall_rate, phi, tau2' end,
        case when centre_hidden or n_hidden then 'lower_95, upper_95, lower_998, upper_998' end,
        case when x_hidden or n_hidden or centre_hidden then 'position' end
    ), '') as suppressed_columns
from placed
order by sort_order, unit_type, unit;
