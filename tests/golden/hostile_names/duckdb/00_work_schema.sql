-- sqlmatch study 'annual_pass', step 00: work_schema (duckdb)
-- Create the study's work schema if needed.
-- kind: prepares the work schema
-- reads: -
-- skip this file when the schema exists: PostgreSQL refuses CREATE SCHEMA, even with IF NOT EXISTS, to a role without CREATE on the database (`sqlmatch run` skips it the same way)

/* The schema that holds this study's tables; sqlmatch writes nowhere else. */
CREATE SCHEMA IF NOT EXISTS "sqlmatch";
