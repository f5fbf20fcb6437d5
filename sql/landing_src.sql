-- The staged landing file: one row per record that parsed, key source_row (its record
-- number in the file, counting the rejected records before it), so loaded and quarantined
-- rows name the row a user can find.
with raw as (
    select * from landing_raw
),
shifts as (
    select * from landing_reject_shifts
),
numbered as (
    select coalesce(j.shift, 0) + r.__row as source_row, r.* exclude (__row)
    from raw r
    asof left join shifts j on r.__row > j.good_before
)
select * from numbered
