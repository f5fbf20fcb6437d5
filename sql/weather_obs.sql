-- Checked weather rows of one landing file: one row per landing row, key source_row.
-- Station clocks are taken as UTC when no offset is given (stations report in UTC);
-- Fahrenheit files are converted so the warehouse holds °C only. Duplicates follow the
-- meter rule: same value counted once, a conflict (in the file, with a loaded row, or
-- with a key already quarantined as a conflict) never silently chosen. Columns a Parquet
-- file holds already typed arrive as typed_<column> (their text is then null).
with source as (
    select * from landing
),
typed as (
    select
        source_row,
        nullif(trim(station_id), '') as station_id,
        observed_at as observed_text,
        coalesce(typed_observed_at, utc_instant(observed_at, 'UTC')) as observed_at_utc,
        coalesce(
            typed_dry_bulb_c,
            try_cast(trim(dry_bulb_c) as double),
            (coalesce(typed_dry_bulb_f, try_cast(trim(dry_bulb_f) as double)) - 32.0) * 5.0 / 9.0
        ) as dry_bulb_c
    from source
),
row_checked as materialized (
    select
        *,
        case
            when station_id is null then 'missing_key'
            when observed_at_utc is null and (observed_text is null or trim(observed_text) = '')
                then 'missing_timestamp'
            when observed_at_utc is null then 'bad_timestamp'
            when dry_bulb_c is null or isnan(dry_bulb_c) then 'bad_number'
            when dry_bulb_c not between -60 and 60 then 'temperature_out_of_range'
        end as row_reason
    from typed
),
-- Keys quarantined as conflicts, parsed back from their text (station_id|instant).
conflict_keys as (
    select distinct
        regexp_extract(record_key, '^(.*)\|[^|]*$', 1) as station_id,
        try_cast(regexp_extract(record_key, '\|([^|]*)$', 1) as timestamptz) as observed_at_utc
    from quarantine
    where reason = 'conflicting_duplicate' and record_key is not null
),
-- Keys given more than once in this file (usually none).
repeated_keys as (
    select
        station_id,
        observed_at_utc,
        min(dry_bulb_c) <> max(dry_bulb_c) as key_conflict,
        min(source_row) as first_row
    from row_checked
    where row_reason is null
    group by station_id, observed_at_utc
    having count(*) > 1
),
keyed as (
    select
        r.*,
        coalesce(d.key_conflict, false) as key_conflict,
        d.first_row is not null and d.first_row <> r.source_row as key_repeat,
        w.dry_bulb_c is not null and w.dry_bulb_c <> r.dry_bulb_c as loaded_conflict,
        w.dry_bulb_c is not null as loaded_same_key,
        c.station_id is not null as known_conflict
    from row_checked r
    left join repeated_keys d
        on r.row_reason is null
        and d.station_id = r.station_id
        and d.observed_at_utc = r.observed_at_utc
    left join weather_obs w
        on r.row_reason is null
        and w.station_id = r.station_id
        and w.observed_at_utc = r.observed_at_utc
    left join conflict_keys c
        on r.row_reason is null
        and c.station_id = r.station_id
        and c.observed_at_utc = r.observed_at_utc
),
judged as (
    select
        *,
        case
            when row_reason is not null then row_reason
            when key_conflict or loaded_conflict or known_conflict then 'conflicting_duplicate'
            when key_repeat or loaded_same_key then 'exact_duplicate'
        end as reason
    from keyed
),
checked as (
    select
        station_id, observed_at_utc, dry_bulb_c, source_row,
        case when reason = 'conflicting_duplicate' then concat_ws('|', station_id, observed_at_utc) end
            as record_key,
        loaded_conflict, reason
    from judged
)
select * from checked
