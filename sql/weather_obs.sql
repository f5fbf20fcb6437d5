-- Checked weather rows of one landing file: one row per landing row, key source_row.
-- Station clocks are taken as UTC when no offset is given (stations report in UTC);
-- Fahrenheit files are converted so the warehouse holds °C only. Duplicates follow the
-- meter rule: same value counted once, a conflict (in the file, with a loaded row, or
-- with a key already quarantined as a conflict) never silently chosen.
with source as (
    select * from landing
),
typed as (
    select
        source_row,
        nullif(trim(station_id), '') as station_id,
        observed_at as observed_text,
        utc_instant(observed_at, 'UTC') as observed_at_utc,
        coalesce(try_cast(trim(dry_bulb_c) as double), (try_cast(trim(dry_bulb_f) as double) - 32.0) * 5.0 / 9.0)
            as dry_bulb_c
    from source
),
row_checked as (
    select
        *,
        case
            when station_id is null then 'missing_key'
            when observed_text is null or trim(observed_text) = '' then 'missing_timestamp'
            when observed_at_utc is null then 'bad_timestamp'
            when dry_bulb_c is null or isnan(dry_bulb_c) then 'bad_number'
            when dry_bulb_c not between -60 and 60 then 'temperature_out_of_range'
        end as row_reason,
        concat_ws('|', station_id, observed_at_utc) as record_key
    from typed
),
conflict_keys as (
    select distinct record_key from quarantine where reason = 'conflicting_duplicate' and record_key is not null
),
keyed as (
    select
        r.*,
        min(r.dry_bulb_c) over key_all <> max(r.dry_bulb_c) over key_all as key_conflict,
        row_number() over key_rows as key_rank,
        w.dry_bulb_c is not null and w.dry_bulb_c <> r.dry_bulb_c as loaded_conflict,
        w.dry_bulb_c is not null as loaded_same_key,
        c.record_key is not null as known_conflict
    from row_checked r
    left join weather_obs w
        on r.row_reason is null
        and w.station_id = r.station_id
        and w.observed_at_utc = r.observed_at_utc
    left join conflict_keys c on r.row_reason is null and c.record_key = r.record_key
    window
        key_all as (partition by r.station_id, r.observed_at_utc, r.row_reason is null),
        key_rows as (partition by r.station_id, r.observed_at_utc, r.row_reason is null order by r.source_row)
),
checked as (
    select
        station_id, observed_at_utc, dry_bulb_c, source_row, record_key, loaded_conflict,
        case
            when row_reason is not null then row_reason
            when key_conflict or loaded_conflict or known_conflict then 'conflicting_duplicate'
            when key_rank > 1 or loaded_same_key then 'exact_duplicate'
        end as reason
    from keyed
)
select * from checked
