-- Records the CSV reader rejected: one row per rejected record, key first_row (its first
-- data line). A rejected record of n lines starting at data line k holds rows k .. k+n-1,
-- so parsed records after it are shifted by the lines of all rejects before them.
with rejects as (
    select * from landing_rejects
),
first_error as (
    select
        line - 1 as first_row,
        string_split(replace(trim(any_value(csv_line), chr(13) || chr(10)), chr(13) || chr(10), chr(10)), chr(10))
            as lines
    from rejects
    group by line
),
spanned as (
    select first_row, lines, len(lines) as span,
        sum(len(lines)) over (order by first_row rows unbounded preceding) as shift
    from first_error
)
select * from spanned
