-- The physical data lines of a CSV damaged by quotes: one row per non-blank line after the
-- header, key source_row (its number among those lines, the record number in an undamaged
-- file). A line with an odd number of double quotes opens a field it never closes.
with text as (
    select rowid as position, line from landing_line_text
),
numbered as (
    select
        row_number() over (order by position) as source_row,
        line,
        (length(line) - length(replace(line, '"', ''))) % 2 = 0 as balanced
    from text
    where line is not null
)
select * from numbered
