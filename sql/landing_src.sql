-- The staged landing file: one row per record that parsed, key source_row (its record
-- number in the file, counting any rejected records before it), so loaded and quarantined
-- rows name the row a user can find.
with raw as (
    select * from landing_raw
),
numbered as (
    select __row as source_row, * exclude (__row)
    from raw
)
select * from numbered
