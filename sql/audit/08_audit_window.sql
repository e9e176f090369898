-- The reporting window: the latest $history_periods periods that hold data, where a period
-- is a calendar $period ('month' or ISO 'week', Monday first) of the collection time in UTC
-- (audit_unit_period_counts, 02_audit_layer_update.sql). The period still under way (the
-- latest collection time falls before its last day) is shown and marked partial (default),
-- so a site's first extract of a week or a month gives a report; with
-- $complete_periods_only it is left out until it ends (its small, growing counts are
-- suppressed more often and can force complementary suppression into complete periods).
-- Denominators (stated in the report):
--   the FiO2/device documentation measures use every sample labelled arterial or of unknown
--     type, whatever its data-quality flags (a flag such as fio2_outside_device_range is what
--     they count);
--   oxygenation measures, and the oxygen-status documentation measures (oxygen status
--     unknown, oxygen given but not documented), use only adult samples whose audit status is
--     usable or caution (audit_status.audit_status), and report the excluded ones and the
--     neonates and children separately.
-- Grain: one row per period in the window; partial = still under way.
create or replace temp table audit_window as
with periods as (
    select
        period_start,
        case
            when $period = 'week' then cast(period_start + interval '6 days' as date)
            else cast(period_start + interval '1 month' - interval '1 day' as date)
        end as last_day
    from audit_unit_period_counts
    group by period_start
),
reportable as (
    select p.period_start, l.latest_day < p.last_day as partial
    from periods as p
    cross join (select cast(max(latest_collected_at) as date) as latest_day from audit_unit_period_counts) as l
    where not $complete_periods_only or l.latest_day >= p.last_day
),
ranked as (
    select period_start, partial, dense_rank() over (order by period_start desc) as periods_back
    from reportable
)
select period_start, partial
from ranked
where periods_back <= $history_periods;
