-- Checked tariff rows of one landing file: one row per landing row, key source_row.
-- Months are given as 'a-b' (inclusive, may wrap the year) or a single month; hours are
-- local, end exclusive, so each plan's rows tile the hours of the day.
with source as (
    select * from landing
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
checked as (
    select
        rate_plan_id, month_from, month_to, day_type, start_hour, end_hour, price_per_kwh, source_row,
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
        end as reason
    from typed
)
select * from checked
