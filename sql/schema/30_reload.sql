-- What `abg-audit reload` (pipeline/reload.py) keeps beside the ingestion tables. Idempotent:
-- ADD COLUMN IF NOT EXISTS upgrades an older store in place.

-- Why an earlier version left the store: NULL for a correction (a later delivery of the same
-- record with other values); the reload's reason, e.g. "reloaded after profile change
-- (ward_analysers 3f2a.. -> 91c0..): wrong time zone", when a file was read again.
alter table superseded_records add column if not exists superseded_reason varchar;
alter table superseded_prescriptions add column if not exists superseded_reason varchar;

-- A reloaded file keeps its first loaded_at (the delivery order decides which version of a
-- record is current); these say when and why it was last read again.
alter table ingested_files add column if not exists reloaded_at timestamp;
alter table ingested_files add column if not exists reload_reason varchar;
