-- Checked premise rows of one landing file: one row per landing row, key source_row.
-- Every row comes out with either typed values or a reason, so ingest can prove that
-- rows read = rows loaded + rows quarantined + exact duplicates. A premise already loaded
-- from another file with different attributes keeps its loaded row (meter and thermostat
-- rows hang on it) and the new row is quarantined as a conflict; the same row again is an
-- exact duplicate.
with source as (
    select * from landing
),
typed as (
    select
        source_row,
        nullif(trim(premise_id), '') as premise_id,
        nullif(trim(timezone), '') as timezone,
        nullif(trim(weather_station_id), '') as weather_station_id,
        nullif(trim(rate_plan_id), '') as rate_plan_id,
        try_cast(trim(comfort_cool_c) as double) as comfort_cool_c,
        try_cast(trim(comfort_heat_c) as double) as comfort_heat_c,
        coalesce(nullif(trim(cohort), ''), 'all') as cohort,
        try_cast(trim(floor_area_m2) as double) as floor_area_m2
    from source
),
known_zones as (
    select name from pg_timezone_names()
),
keyed as (
    select
        typed.*,
        count(*) over (partition by premise_id) as key_rows,
        count(distinct (timezone, weather_station_id, rate_plan_id, comfort_cool_c, comfort_heat_c, cohort))
            over (partition by premise_id) as key_values,
        row_number() over (partition by premise_id order by source_row) as key_rank,
        exists (select 1 from premise p where p.premise_id = typed.premise_id) as already_loaded,
        exists (
            select 1 from premise p
            where p.premise_id = typed.premise_id
                and (p.timezone, p.weather_station_id, p.rate_plan_id, p.comfort_cool_c, p.comfort_heat_c, p.cohort)
                    = (typed.timezone, typed.weather_station_id, typed.rate_plan_id, typed.comfort_cool_c,
                       typed.comfort_heat_c, typed.cohort)
        ) as loaded_same,
        timezone in (select name from known_zones) as zone_known,
        rate_plan_id in (select rate_plan_id from tariff_rate) as plan_known
    from typed
),
checked as (
    select
        *,
        case
            when premise_id is null then 'missing_key'
            when timezone is null or weather_station_id is null or rate_plan_id is null then 'missing_value'
            when not zone_known then 'unknown_time_zone'
            when not plan_known then 'unknown_rate_plan'
            when comfort_cool_c is null or comfort_heat_c is null then 'bad_number'
            when comfort_cool_c not between $cool_low and $cool_high then 'setpoint_out_of_range'
            when comfort_heat_c not between $heat_low and $heat_high then 'setpoint_out_of_range'
            when key_values > 1 then 'conflicting_duplicate'
            when already_loaded and not loaded_same then 'conflicting_duplicate'
            when key_rank > 1 or already_loaded then 'exact_duplicate'
        end as reason
    from keyed
)
select * from checked
