-- Row counts of the checked landing file: exactly one row. Every checked row is loaded (no
-- reason), an exact duplicate or quarantined, so these three add up to the rows read.
with rows as (
    select * from checked
),
counts as (
    select
        count(*) as rows_checked,
        count(*) filter (reason is null) as rows_loaded,
        count(*) filter (reason = 'exact_duplicate') as rows_duplicate
    from rows
)
select * from counts
