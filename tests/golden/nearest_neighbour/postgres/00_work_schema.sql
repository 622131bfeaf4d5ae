-- sqlmatch study 'annual_pass', step 00: work_schema (postgres)
-- Create the study's work schema if needed.
-- kind: prepares the work schema
-- reads: -

/* The schema that holds this study's tables; sqlmatch writes nowhere else. */
CREATE SCHEMA IF NOT EXISTS "sqlmatch";
