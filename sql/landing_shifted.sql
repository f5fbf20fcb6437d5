-- Parsed records of a CSV some of whose records were rejected: one row per parsed record,
-- key __row (its record number in the file, counting the rejected records before it), so
-- loaded and quarantined rows name the row a user can find. Only built when there are
-- rejects: the as-of join sorts every record.
with parsed as (
    select * from landing_csv
),
shifts as (
    select * from landing_reject_shifts
),
numbered as (
    select coalesce(j.shift, 0) + r.__row as __row, r.* exclude (__row)
    from parsed r
    asof left join shifts j on r.__row > j.good_before
)
select * from numbered
