-- Flags of the public contract: one row per (sample, rule) that fired, with the evidence.
create table if not exists flags (
    sample_id varchar,
    rule_id varchar,
    kind varchar,               -- data_quality, clinical
    severity varchar,           -- high, medium, low, info
    message varchar,            -- the evidence in words
    evidence varchar,           -- the evidence as JSON: measured values and the limit crossed
    run_id varchar
);
