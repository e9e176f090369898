-- One step of complementary (secondary) suppression on audit_cell; the caller repeats it
-- until it hides nothing more. In every line of audit_line holding exactly one hidden cell,
-- that cell could be recovered as total minus the other parts, so one more cell of the line
-- is hidden. Choice, in order: a non-zero count (a hidden zero protects nothing when its
-- total is 0), an inner cell rather than the line's total, a cell that also sits in other
-- lines with exactly one hidden cell (one choice then protects several lines, which keeps
-- the pattern small), the smallest count, then the lowest cell_id (deterministic).
-- Statement, not a relation: updates audit_cell.hidden.
update audit_cell
set hidden = true, hidden_reason = 'complementary'
where cell_id in (
    with line_hidden as (
        select l.line_id, sum(case when c.hidden then 1 else 0 end) as hidden_cells
        from audit_line as l
        join audit_cell as c on c.cell_id = l.cell_id
        group by l.line_id
    ),
    exposure as (
        select l.cell_id, sum(case when h.hidden_cells = 1 then 1 else 0 end) as exposed_lines
        from audit_line as l
        join line_hidden as h on h.line_id = l.line_id
        group by l.cell_id
    ),
    ranked as (
        select
            l.cell_id,
            row_number() over (
                partition by l.line_id
                order by case when c.value = 0 then 1 else 0 end,
                         case when l.is_total then 1 else 0 end,
                         e.exposed_lines desc,
                         c.value,
                         c.cell_id
            ) as pick
        from audit_line as l
        join line_hidden as h on h.line_id = l.line_id and h.hidden_cells = 1
        join audit_cell as c on c.cell_id = l.cell_id
        join exposure as e on e.cell_id = l.cell_id
        where not c.hidden
    )
    select cell_id from ranked where pick = 1
);
