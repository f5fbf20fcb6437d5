-- Adds the ingest_log entry of one file (one row per file, key source_file): its hash and
-- how its rows were split, so that rows read = loaded + quarantined + duplicate can be checked.
insert into ingest_log (
    source_file, folder, content_hash, rows_read, rows_loaded, rows_quarantined, rows_duplicate, status, message,
    seconds, ingested_at
)
values ($f, $folder, $h, $read, $loaded, $quar, $dup, $status, $msg, $secs, now())
