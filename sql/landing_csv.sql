-- Records of a CSV that parsed without quote damage: one row per parsed record, key __row
-- (its position among parsed records; landing_shifted moves it past any rejected ones).
with parsed as (
    select rowid + 1 as __row, * from landing_parsed
)
select * from parsed
