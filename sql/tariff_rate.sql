-- Checked tariff rows of one landing file: one row per landing row, key source_row.
-- Months are given as 'a-b' (inclusive, may wrap the year) or a single month; hours are
-- local, end exclusive. The hourly grid joins each premise-hour to the one row of its plan
-- that covers it, so a plan's rows of one day type must tile every hour of each month they
-- claim exactly once: rows that overlap another row of the plan (in this file or already
-- loaded from another) are quarantined as tariff_overlap, since which price is meant cannot
-- be told; the plan's other rows of that day type then leave hours unpriced and are
-- quarantined as tariff_gap, so a plan is loaded whole or its day type not at all.
with source as (
    select * from landing
),
loaded as (
    select * from tariff_rate
),
typed as (
    select
        source_row,
        nullif(trim(rate_plan_id), '') as rate_plan_id,
        try_cast(split_part(trim(months), '-', 1) as integer) as month_from,
        try_cast(coalesce(nullif(split_part(trim(months), '-', 2), ''), split_part(trim(months), '-', 1))
            as integer) as month_to,
        lower(trim(day_type)) as day_type,
        try_cast(start_hour as integer) as start_hour,
        try_cast(end_hour as integer) as end_hour,
        try_cast(price_per_kwh as double) as price_per_kwh
    from source
),
row_checked as (
    select
        *,
        case
            when rate_plan_id is null then 'missing_key'
            when month_from is null or month_to is null or start_hour is null or end_hour is null
                or price_per_kwh is null then 'bad_number'
            when month_from not between 1 and 12 or month_to not between 1 and 12 then 'bad_code'
            when day_type not in ('weekday', 'weekend') then 'bad_code'
            when start_hour not between 0 and 23 or end_hour not between 1 and 24
                or end_hour <= start_hour then 'bad_code'
            when price_per_kwh < 0 or price_per_kwh > 10 then 'price_out_of_range'
            when row_number() over (
                partition by rate_plan_id, month_from, month_to, day_type, start_hour, end_hour, price_per_kwh
                order by source_row
            ) > 1 then 'exact_duplicate'
            when exists (
                select 1 from loaded l
                where (l.rate_plan_id, l.month_from, l.month_to, l.day_type, l.start_hour, l.end_hour,
                       l.price_per_kwh)
                    = (typed.rate_plan_id, typed.month_from, typed.month_to, typed.day_type,
                       typed.start_hour, typed.end_hour, typed.price_per_kwh)
            ) then 'exact_duplicate'
        end as reason
    from typed
),
-- Each candidate row (and each loaded row of another file) as the (month, hour) cells it prices.
cells as (
    select source_row, rate_plan_id, day_type, month_from, month_to, start_hour, end_hour, false as is_loaded
    from row_checked
    where reason is null
    union all
    select null, rate_plan_id, day_type, month_from, month_to, start_hour, end_hour, true
    from loaded
),
month_cells as (
    select
        *,
        unnest(
            case
                when month_from <= month_to then range(month_from, month_to + 1)
                else list_concat(range(month_from, 13), range(1, month_to + 1))
            end
        ) as month
    from cells
),
hour_cells as (
    select *, unnest(range(start_hour, end_hour)) as hour
    from month_cells
),
cell_counts as (
    select *, count(*) over (partition by rate_plan_id, day_type, month, hour) as rows_here
    from hour_cells
),
overlapping as (
    select distinct source_row
    from cell_counts
    where rows_here > 1 and not is_loaded
),
-- Hours each claimed (plan, day type, month) has priced once the overlapping rows are gone.
tiling as (
    select rate_plan_id, day_type, month, count(distinct hour) as hours_priced
    from hour_cells
    where is_loaded or source_row not in (select source_row from overlapping)
    group by all
),
gapped as (
    select distinct rate_plan_id, day_type
    from tiling
    where hours_priced < 24
),
checked as (
    select
        r.rate_plan_id, r.month_from, r.month_to, r.day_type, r.start_hour, r.end_hour, r.price_per_kwh,
        r.source_row,
        case
            when r.reason is not null then r.reason
            when r.source_row in (select source_row from overlapping) then 'tariff_overlap'
            when exists (
                select 1 from gapped g where g.rate_plan_id = r.rate_plan_id and g.day_type = r.day_type
            ) then 'tariff_gap'
        end as reason
    from row_checked r
)
select * from checked
