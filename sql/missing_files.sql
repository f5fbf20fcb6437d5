-- Files logged but gone from the lake: one row per file, key source_file; their rows stay
-- in the warehouse, which is the record once the lake is pruned.
with logged as (
    select * from ingest_log
),
missing as (
    select source_file, folder, rows_read, rows_loaded, rows_quarantined, rows_duplicate
    from logged
    where missing_since is not null
    order by source_file
)
select * from missing
