-- Marks ingest_log entries whose files left the lake (one row per file, key source_file):
-- missing_since keeps the first run that missed them; their rows stay.
update ingest_log
set missing_since = coalesce(missing_since, now())
where not list_contains($present, source_file)
