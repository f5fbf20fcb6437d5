-- Records parsed from the scratch file of good lines: one row per parsed record, key __row
-- (its landing file's record number). The scratch file holds one record per line, so the
-- parsed records are the good lines the reader did not reject, in order.
with good as (
    select * from landing_good_lines
),
rejected as (
    select distinct line as k from landing_rejects
),
kept as (
    select source_row, row_number() over (order by k) as i
    from good
    anti join rejected using (k)
),
parsed as (
    select rowid + 1 as i, * from landing_parsed
),
numbered as (
    select kept.source_row as __row, parsed.* exclude (i)
    from parsed
    join kept using (i)
)
select * from numbered
