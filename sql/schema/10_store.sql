-- The store's tables for ingestion and provenance. Created once; every statement is
-- idempotent so opening an existing store is harmless. Column names follow
-- pipeline/schema.py (the canonical record); a test keeps the two in step.

-- One row per distinct sample (the latest version), canonical units.
create table if not exists records (
    sample_id varchar primary key,
    patient_id varchar,                 -- raw identifier; NULL when the site keeps none
    patient_key varchar,                -- keyed pseudonym (HMAC-SHA256), used in all outputs
    unit varchar,
    analyser_id varchar,
    age_years double,
    birth_date date,
    collected_at timestamp,             -- UTC
    resulted_at timestamp,              -- UTC
    sample_type varchar,
    o2_device varchar,
    o2_flow_l_min double,
    fio2 double,                        -- fraction 0.21-1.00
    barometric_pressure_mmhg double,
    temperature_c double,
    ph double,
    paco2_mmhg double,
    pao2_mmhg double,
    hco3_mmol_l double,
    base_excess_mmol_l double,
    sao2_pct double,
    sao2_is_calculated boolean,
    spo2_pct double,
    hb_g_dl double,
    na_mmol_l double,
    k_mmol_l double,
    cl_mmol_l double,
    lactate_mmol_l double,
    glucose_mmol_l double,
    cohb_pct double,
    methb_pct double,
    mean_airway_pressure_cmh2o double,
    peep_cmh2o double,
    hypercapnic_risk boolean,
    result_status varchar,              -- reported, or a text result such as haemolysed
    content_hash ubigint,               -- hash of the values; tells a duplicate from a correction
    source_file varchar,
    source_row bigint,                  -- data record number in the file, 1 = first after the header
    file_sha256 varchar,
    run_id varchar,
    version integer                     -- 1 for the first delivery, +1 per correction
);

-- Earlier versions of a sample replaced by a correction (same sample_id, other values).
create table if not exists superseded_records as
    select *, null::varchar as superseded_by_file, null::bigint as superseded_by_row,
           null::varchar as superseded_in_run
    from records with no data;

-- Fields added after a store was first created (every statement is idempotent).
alter table records add column if not exists glucose_mmol_l double;
alter table records add column if not exists cohb_pct double;
alter table records add column if not exists methb_pct double;
alter table superseded_records add column if not exists glucose_mmol_l double;
alter table superseded_records add column if not exists cohb_pct double;
alter table superseded_records add column if not exists methb_pct double;

-- Every input row that could not become a record.
create table if not exists quarantine (
    run_id varchar,
    source_file varchar,
    file_sha256 varchar,
    source_row bigint,
    sample_id varchar,
    reason_code varchar,
    failed_columns varchar,             -- field:REASON pairs, every failing cell of the row
    original_text varchar               -- the row's cells as JSON (source header -> text)
);

-- Input rows merged as duplicates of a record (identical values): counted, not stored twice.
create table if not exists merged_duplicates (
    sample_id varchar,
    file_sha256 varchar,
    source_row bigint,
    duplicate_of varchar,               -- 'row in the same file' or 'record already held'
    run_id varchar
);

-- Qualified values (">600") and text results ("haemolysed") kept beside the record.
create table if not exists record_value_notes (
    sample_id varchar,
    file_sha256 varchar,
    field varchar,
    comparator varchar,
    result_status varchar,
    original_text varchar
);

-- Ledger of loaded files: the same bytes are never loaded twice.
create table if not exists ingested_files (
    file_sha256 varchar primary key,
    source_path varchar,
    profile varchar,
    size_bytes bigint,
    run_id varchar,
    loaded_at timestamp,
    rows_in bigint,
    rows_loaded bigint,
    rows_quarantined bigint,
    rows_duplicate bigint,
    rows_superseded_in_file bigint,
    corrections bigint,
    notes varchar
);

-- What happened to every file each run saw: loaded, already_loaded or rejected.
create table if not exists file_events (
    run_id varchar,
    source_path varchar,
    file_sha256 varchar,
    profile varchar,
    outcome varchar,
    reason_code varchar,
    message varchar,
    rows_in bigint,
    rows_loaded bigint,
    rows_quarantined bigint,
    rows_duplicate bigint,
    rows_superseded_in_file bigint
);

-- One row per pipeline run.
create table if not exists runs (
    run_id varchar primary key,
    command varchar,
    started_at timestamp,
    finished_at timestamp,
    outcome varchar,                    -- running, succeeded, completed_with_rejections, failed
    exit_code integer,
    code_version varchar,
    duckdb_version varchar,
    polars_version varchar,
    config_sha256 varchar,
    inputs varchar,                     -- JSON list of {path, size, sha256, profile}
    files_seen integer,
    files_loaded integer,
    files_already_loaded integer,
    files_rejected integer,
    rows_in bigint,
    rows_loaded bigint,
    rows_quarantined bigint,
    rows_duplicate bigint,
    rows_superseded_in_file bigint,
    summary varchar
);
