-- The lines of audit_cell: sets of published cells whose values satisfy "total = sum of
-- parts", so that one hidden cell in a line could be recovered from the others. Kinds:
--   period:    one family and place (unit, all units of a type, or the site) across every
--              period, total = all periods;
--   unit:      one family and period (or all periods) across the units of one type, total =
--              all units of that type; or, when the unit-type level is not published (one
--              type only), across every unit, total = the site;
--   unit_type: one family and period (or all periods) across the unit types, total = the site;
--   partition: one partition of audit_partition in one place and period.
-- 'patients' (distinct counts) is not additive and belongs to no line.
-- Grain: one row per (line, cell).
create or replace temp table audit_line as
with type_level as (
    select count(*) > 0 as shown from audit_cell where unit is null and unit_type is not null
),
members as (
    select 'period' as kind, c.family as key_family, c.unit as key_unit, c.unit_type as key_type,
           null as key_period, null as key_partition, c.cell_id, c.period_start is null as is_total
    from audit_cell as c
    where c.additive
    union all
    -- units within their type (total: the type), or within the site when types are not shown
    select 'unit', c.family, null,
           case when (select shown from type_level) then c.unit_type end,
           c.period_start, null, c.cell_id, c.unit is null
    from audit_cell as c
    where c.additive
      and (c.unit is not null
           or (c.unit_type is not null and (select shown from type_level))
           or (c.unit_type is null and not (select shown from type_level)))
    union all
    -- unit types within the site
    select 'unit_type', c.family, null, null, c.period_start, null, c.cell_id, c.unit_type is null
    from audit_cell as c
    where c.additive and c.unit is null and (select shown from type_level)
    union all
    select 'partition', null, c.unit, c.unit_type, c.period_start, p.partition_id, c.cell_id, p.role = 'total'
    from audit_cell as c
    join audit_partition as p on p.family = c.family
)
select
    dense_rank() over (order by kind, key_family, key_unit, key_type, key_period, key_partition) as line_id,
    kind,
    cell_id,
    is_total
from members;
