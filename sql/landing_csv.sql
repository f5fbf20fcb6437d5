-- Records of a CSV that parsed without quote damage: one row per parsed record, key __row
-- (its position among parsed records; landing_src shifts it past the rejected ones).
with parsed as (
    select rowid + 1 as __row, * from landing_parsed
)
select * from parsed
