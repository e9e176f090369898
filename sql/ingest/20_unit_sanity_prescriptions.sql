-- File-level unit check of a prescriptions file (see 20_unit_sanity.sql): the median
-- prescribed FiO2 after conversion. FiO2 in percent declared as a fraction moves it far
-- above 1, a fault of the file rather than of its rows.
-- Grain: one row per checked field.
select 'fio2' as field, count(fio2) as n, median(fio2) as median_value
from stage_rows
where parse_reason is null;
