-- Checked meter rows of one landing file: one row per landing row, key source_row.
-- Instants become UTC using the premise's zone when the file gives wall-clock time;
-- duplicates are judged on (premise_id, interval_start_utc) so that a repeated interval
-- with the same kWh counts once and a conflicting one is never silently chosen.
with source as (
    select * from landing
),
typed as (
    select
        l.source_row,
        l.raw,
        nullif(trim(l.premise_id), '') as premise_id,
        l.interval_start as interval_text,
        p.timezone,
        utc_instant(l.interval_start, p.timezone) as interval_start_utc,
        try_cast(l.interval_minutes as integer) as interval_minutes,
        coalesce(try_cast(l.kwh as double), try_cast(l.wh as double) / 1000.0) as kwh,
        lower(coalesce(nullif(trim(l.quality), ''), 'actual')) as quality,
        p.premise_id is not null as premise_known
    from source l
    left join premise p on p.premise_id = trim(l.premise_id)
),
keyed as (
    select
        typed.*,
        count(distinct typed.kwh) over (partition by premise_id, interval_start_utc) as key_values,
        row_number() over (partition by premise_id, interval_start_utc order by source_row) as key_rank,
        m.kwh as loaded_kwh
    from typed
    left join meter_read m using (premise_id, interval_start_utc)
),
checked as (
    select
        premise_id, interval_start_utc, interval_minutes, kwh, quality, source_row, raw,
        case
            when premise_id is null then 'missing_key'
            when not premise_known then 'unknown_premise'
            when interval_text is null or trim(interval_text) = '' then 'missing_timestamp'
            when interval_start_utc is null then 'bad_timestamp'
            when local_time_missing(interval_text, timezone) then 'nonexistent_local_time'
            when local_time_ambiguous(interval_text, timezone) then 'ambiguous_local_time'
            when interval_minutes is null or interval_minutes not in (15, 30, 60) then 'bad_interval_length'
            when epoch(interval_start_utc)::bigint % (interval_minutes * 60) <> 0 then 'interval_not_aligned'
            when kwh is null then 'bad_number'
            when kwh < 0 or kwh > $max_kw * interval_minutes / 60.0 then 'kwh_out_of_range'
            when quality not in ('actual', 'estimated') then 'bad_code'
            when key_values > 1 then 'conflicting_duplicate'
            when loaded_kwh is not null and loaded_kwh <> kwh then 'conflicting_duplicate'
            when key_rank > 1 or loaded_kwh is not null then 'exact_duplicate'
        end as reason
    from keyed
)
select * from checked
