-- One step of suppression against recovery through several sums at once. A hidden cell can
-- follow exactly from the shown cells even when every line holds two or more hidden cells:
-- in a unit x period table, two units each hiding the same two periods fix the sum of those
-- two cells in a third unit, and with it a third hidden cell of that unit. The caller finds
-- such cells by linear algebra over audit_line (pipeline/audit.py, determined_cells) and lists
-- them in audit_determined; this step hides, for each of them, one more cell of one of its
-- lines, and the caller then repeats the complementary step and the search until none is left.
-- Choice, in order: a non-zero count, an inner cell rather than a total, the smallest count,
-- then the lowest cell_id (deterministic).
-- Statement, not a relation: updates audit_cell.hidden.
update audit_cell
set hidden = true, hidden_reason = 'complementary'
where cell_id in (
    with candidates as (
        select
            d.cell_id as determined_id,
            c.cell_id,
            row_number() over (
                partition by d.cell_id
                order by case when c.value = 0 then 1 else 0 end,
                         case when l.is_total then 1 else 0 end,
                         c.value,
                         c.cell_id
            ) as pick
        from audit_determined as d
        join audit_line as own on own.cell_id = d.cell_id
        join audit_line as l on l.line_id = own.line_id
        join audit_cell as c on c.cell_id = l.cell_id
        where not c.hidden
    )
    select cell_id from candidates where pick = 1
);
