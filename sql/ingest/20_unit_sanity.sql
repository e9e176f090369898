-- File-level unit check: medians of the converted values. A unit declared wrongly for a
-- whole file moves the median far outside any patient population (a kPa PaCO2 of 5.3
-- read as mmHg), which is a fault of the file, not of its rows.
-- Grain: one row per checked field.
select field, count(v) as n, median(v) as median_value
from (
    unpivot (
        select paco2_mmhg, pao2_mmhg, fio2, temperature_c, hb_g_dl
        from stage_rows
        where parse_reason is null
    )
    on columns(*) into name field value v
)
group by field;
