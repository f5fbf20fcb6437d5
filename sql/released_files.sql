-- Files to check again when one file is replaced: one row per file, key source_file. Those
-- holding conflicts with the file's old rows and, when old rows go, those whose exact
-- duplicates may have been copies of them (else a reading would be lost with its copy).
with conflicts as (
    select q.source_file
    from quarantine q
    semi join (select record_key from quarantine where source_file = $f) mine using (record_key)
),
duplicates as (
    select source_file
    from ingest_log
    where $replacing and folder = $folder and rows_duplicate > 0
),
candidates as (
    select source_file from conflicts
    union all
    select source_file from duplicates
),
released as (
    select distinct source_file
    from candidates
    where source_file <> $f and list_contains($releasable, source_file)
    order by source_file
)
select * from released
