-- Lines with balanced quotes, written one per line to a scratch file and parsed: one row
-- per line, key k (its line in the scratch file), carrying source_row back to the landing file.
with lines as (
    select * from landing_lines
),
good as (
    select row_number() over (order by source_row) as k, source_row, line
    from lines
    where balanced
)
select * from good
