-- Drops one file's quarantine rows and ingest_log entry (its typed rows are dropped by
-- table), so that it can be checked again from scratch inside the same transaction.
delete from quarantine where source_file = $f;
delete from ingest_log where source_file = $f
