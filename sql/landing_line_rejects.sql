-- Lines of a quote-damaged CSV that are quarantined: one row per line, key source_row;
-- those with an unclosed quote and the balanced ones the reader still rejected.
with lines as (
    select * from landing_lines
),
good as (
    select * from landing_good_lines
),
rejected as (
    select distinct line as k from landing_rejects
),
unbalanced as (
    select source_row, line from lines where not balanced
),
unparsed as (
    select source_row, line from good semi join rejected using (k)
),
both_kinds as (
    select * from unbalanced
    union all
    select * from unparsed
)
select * from both_kinds
