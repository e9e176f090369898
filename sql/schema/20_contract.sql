-- Results of the incoming-batch contract (pipeline/contract.py): one row per
-- (run, file, check), for loaded and rejected files alike. Counts and percentages only;
-- never a cell value or an identifier.
create table if not exists contract_results (
    run_id varchar,
    file_sha256 varchar,
    source_file varchar,
    check_id varchar,                   -- our stable id, e.g. ph_range (great-expectations meta)
    expectation_type varchar,           -- great-expectations expectation, e.g. expect_column_values_to_be_between
    column_name varchar,                -- column checked; "a, b" for a pair of columns
    severity varchar,                   -- critical or warning
    success boolean,
    blocking boolean,                   -- this failure rejected the file (CONTRACT_FAILED)
    element_count bigint,               -- rows in the batch
    unexpected_count bigint,
    unexpected_percent double,          -- of the values tested (missing values are not tested, except by not-null checks)
    missing_count bigint,
    observed varchar,                   -- summary in words, e.g. "3 of 120 values outside 6.5-8"
    checked_at timestamp                -- UTC
);
