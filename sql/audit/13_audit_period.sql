-- Labels of the reporting periods: 'YYYY-MM' for months, ISO 'YYYY-Www' for weeks, and
-- 'all periods' for the whole reporting window (period_start NULL).
-- partial: the period is still under way (audit_window); the all-periods row is partial when
-- the window holds a partial period.
-- Grain: one row per period of audit_cell, plus the all-periods row.
create or replace temp table audit_period as
select
    period_start,
    case
        when period_start is null then 'all periods'
        when $period = 'week' then
            cast(extract(isoyear from period_start) as varchar) || '-W'
            || lpad(cast(extract(week from period_start) as varchar), 2, '0')
        else
            cast(extract(year from period_start) as varchar) || '-'
            || lpad(cast(extract(month from period_start) as varchar), 2, '0')
    end as period,
    case
        when period_start is null then coalesce((select bool_or(partial) from audit_window), false)
        else coalesce((select w.partial from audit_window as w where w.period_start = p.period_start), false)
    end as partial
from (select distinct period_start from audit_cell) as p;
