-- The lines of audit_cell: sets of published cells whose values satisfy "total = sum of
-- parts", so that one hidden cell in a line could be recovered from the others. Three kinds:
--   period:    one family and unit (or all units) across every period, total = all periods;
--   unit:      one family and period (or all periods) across every unit, total = all units;
--   partition: one partition of audit_partition in one unit and period.
-- 'patients' (distinct counts) is not additive and belongs to no line.
-- Grain: one row per (line, cell).
create or replace temp table audit_line as
with members as (
    select 'period' as kind, c.family as key_family, c.unit as key_unit, null as key_period,
           null as key_partition, c.cell_id, c.period_start is null as is_total
    from audit_cell as c
    where c.additive
    union all
    select 'unit', c.family, null, c.period_start, null, c.cell_id, c.unit is null
    from audit_cell as c
    where c.additive
    union all
    select 'partition', null, c.unit, c.period_start, p.partition_id, c.cell_id, p.role = 'total'
    from audit_cell as c
    join audit_partition as p on p.family = c.family
)
select
    dense_rank() over (order by kind, key_family, key_unit, key_period, key_partition) as line_id,
    kind,
    cell_id,
    is_total
from members;
