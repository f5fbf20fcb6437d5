-- Rejected CSV records split into their lines: one row per line, key source_row, so each
-- line of a damaged record is quarantined under its own row number.
with records as (
    select * from landing_reject_records
),
numbered as (
    select *, unnest(range(1, span + 1)) as i
    from records
),
split as (
    select first_row + i - 1 as source_row, lines[i] as line
    from numbered
)
select * from split
