-- The store's tables for ingestion and provenance. Created once; every statement is
-- idempotent so opening an existing store is harmless. Column names follow
-- pipeline/schema.py (the canonical record); a test keeps the two in step.

-- One row per distinct sample (the latest version), canonical units.
-- No primary key: DuckDB maintains one on a single thread while appending, which made the
-- key most of a big file's load. Ingestion keeps sample_id unique itself (new rows are
-- those whose key is not held, corrections delete the held row first, 40_merge.sql) and
-- checks it after every merge, before the file's transaction commits (45_unique_keys.sql).
-- Stores created before keep their key (DuckDB cannot drop one in place); the merge and
-- the check work the same with it.
create table if not exists records (
    sample_id varchar,
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
    encounter_id varchar,               -- raw admission/episode id; NULL when the site keeps no identifiers
    encounter_key varchar,              -- keyed pseudonym of encounter_id (its own domain)
    target_spo2_low_pct double,         -- prescribed SpO2 target range as charted on the sample
    target_spo2_high_pct double,
    o2_prescribed boolean,              -- oxygen prescribed at sampling, as charted on the sample
    collection_method varchar,          -- arterial_puncture, arterial_line, capillary, venous_puncture, ...
    operator_id varchar,                -- raw staff id; NULL when the site keeps no identifiers
    operator_key varchar,               -- keyed pseudonym of operator_id (its own domain)
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
alter table records add column if not exists encounter_id varchar;
alter table records add column if not exists encounter_key varchar;
alter table records add column if not exists target_spo2_low_pct double;
alter table records add column if not exists target_spo2_high_pct double;
alter table records add column if not exists o2_prescribed boolean;
alter table records add column if not exists collection_method varchar;
alter table records add column if not exists operator_id varchar;
alter table records add column if not exists operator_key varchar;
alter table superseded_records add column if not exists encounter_id varchar;
alter table superseded_records add column if not exists encounter_key varchar;
alter table superseded_records add column if not exists target_spo2_low_pct double;
alter table superseded_records add column if not exists target_spo2_high_pct double;
alter table superseded_records add column if not exists o2_prescribed boolean;
alter table superseded_records add column if not exists collection_method varchar;
alter table superseded_records add column if not exists operator_id varchar;
alter table superseded_records add column if not exists operator_key varchar;

-- The oxygen prescriptions feed ([[inputs]] kind = "prescriptions"): one row per
-- prescription_id, the latest delivery. Loaded like samples: ledger, quarantine,
-- duplicates, corrections (version + 1, the earlier version to superseded_prescriptions).
-- No primary key, as for records: unique by the merge, checked after it.
create table if not exists prescriptions (
    prescription_id varchar,            -- the source system's own order id
    patient_id varchar,                 -- raw identifier; NULL when the site keeps none
    patient_key varchar,                -- same pseudonym as records.patient_key for the same patient
    encounter_id varchar,
    encounter_key varchar,
    unit varchar,
    start_at timestamp,                 -- UTC
    end_at timestamp,                   -- UTC; NULL = open (still active)
    target_spo2_low_pct double,         -- percent; both ends within 50-100 and low < high when both present
    target_spo2_high_pct double,
    o2_device varchar,
    o2_flow_l_min double,
    fio2 double,                        -- fraction
    prescriber_role varchar,
    content_hash ubigint,
    source_file varchar,
    source_row bigint,
    file_sha256 varchar,
    run_id varchar,
    version integer
);

create table if not exists superseded_prescriptions as
    select *, null::varchar as superseded_by_file, null::bigint as superseded_by_row,
           null::varchar as superseded_in_run
    from prescriptions with no data;

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
-- Prescriptions are quarantined here too: record_kind says which feed, record_id holds the
-- row's key (sample_id or prescription_id) for both; sample_id stays the sample's.
alter table quarantine add column if not exists record_kind varchar default 'sample';
alter table quarantine add column if not exists record_id varchar;
update quarantine set record_id = sample_id where record_id is null and sample_id is not null;

-- Input rows merged as duplicates of a record (identical values): counted, not stored twice.
create table if not exists merged_duplicates (
    sample_id varchar,
    file_sha256 varchar,
    source_row bigint,
    duplicate_of varchar,               -- 'row in the same file' or 'record already held'
    run_id varchar
);
alter table merged_duplicates add column if not exists record_kind varchar default 'sample';
alter table merged_duplicates add column if not exists record_id varchar;  -- prescription_id for prescriptions

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
alter table ingested_files add column if not exists kind varchar default 'samples';  -- samples | prescriptions
-- SHA-256 of the profile file the file was loaded with (NULL for files loaded before it was
-- recorded): files read with an older version of their profile can be found and re-read.
alter table ingested_files add column if not exists profile_sha256 varchar;

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
