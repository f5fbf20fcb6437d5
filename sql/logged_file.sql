-- The ingest_log entry of one landing file: at most one row, key source_file; its content
-- hash says whether the file changed since it was loaded.
with logged as (
    select * from ingest_log
),
entry as (
    select content_hash, status, rows_read, rows_loaded, rows_quarantined, rows_duplicate, message
    from logged
    where source_file = $f
)
select * from entry
