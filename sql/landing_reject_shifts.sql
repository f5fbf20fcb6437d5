-- How far parsed records are shifted by the rejects before them: one row per rejected
-- record, key good_before (the last parsed record before it); an asof join gives each
-- parsed record its row number among all records.
with records as (
    select * from landing_reject_records
),
shifts as (
    select first_row - 1 - (shift - span) as good_before, shift
    from records
)
select * from shifts
