-- Checked weather rows of one landing file: one row per landing row, key source_row.
-- Station clocks are taken as UTC when no offset is given (stations report in UTC);
-- Fahrenheit files are converted so the warehouse holds °C only.
with source as (
    select * from landing
),
typed as (
    select
        source_row,
        raw,
        nullif(trim(station_id), '') as station_id,
        observed_at as observed_text,
        utc_instant(observed_at, 'UTC') as observed_at_utc,
        coalesce(try_cast(dry_bulb_c as double), (try_cast(dry_bulb_f as double) - 32.0) * 5.0 / 9.0)
            as dry_bulb_c
    from source
),
keyed as (
    select
        typed.*,
        count(distinct typed.dry_bulb_c) over (partition by station_id, observed_at_utc) as key_values,
        row_number() over (partition by station_id, observed_at_utc order by source_row) as key_rank,
        w.dry_bulb_c as loaded_c
    from typed
    left join weather_obs w using (station_id, observed_at_utc)
),
checked as (
    select
        station_id, observed_at_utc, dry_bulb_c, source_row, raw,
        case
            when station_id is null then 'missing_key'
            when observed_text is null or trim(observed_text) = '' then 'missing_timestamp'
            when observed_at_utc is null then 'bad_timestamp'
            when dry_bulb_c is null then 'bad_number'
            when dry_bulb_c not between -60 and 60 then 'temperature_out_of_range'
            when key_values > 1 then 'conflicting_duplicate'
            when loaded_c is not null and loaded_c <> dry_bulb_c then 'conflicting_duplicate'
            when key_rank > 1 or loaded_c is not null then 'exact_duplicate'
        end as reason
    from keyed
)
select * from checked
