-- Checked meter rows of one landing file: one row per landing row, key source_row.
-- Instants become UTC using the premise's zone when the file gives wall-clock time;
-- duplicates are judged on (premise_id, interval_start_utc) among rows that pass the
-- per-row checks, so a repeated interval with the same kWh counts once and a conflicting
-- one is never silently chosen: not within the file, not against a row already loaded
-- from another file (loaded_conflict: ingest moves that row to quarantine too), and not
-- against a key already quarantined as a conflict. Columns a Parquet file holds already
-- typed arrive as typed_<column> (their text is then null) and are not parsed again.
with source as (
    select * from landing
),
-- Text is trimmed once; typed_<column> (a typed Parquet column) is taken before any text.
trimmed as (
    select
        source_row,
        nullif(trim(premise_id), '') as premise_id,
        trim(interval_start) as interval_text,
        typed_interval_start,
        coalesce(typed_interval_minutes, try_cast(trim(interval_minutes) as integer)) as interval_minutes,
        coalesce(
            typed_kwh, try_cast(trim(kwh) as double), coalesce(typed_wh, try_cast(trim(wh) as double)) / 1000.0
        ) as kwh,
        lower(coalesce(nullif(trim(quality), ''), 'actual')) as quality
    from source
),
parsed as (
    select
        l.* exclude (typed_interval_start),
        p.timezone,
        p.premise_id is not null as premise_known,
        coalesce(
            l.typed_interval_start is not null or regexp_matches(l.interval_text, '(Z|[+-][0-9]{2}(:?[0-9]{2})?)$'),
            false
        ) as has_offset,
        l.typed_interval_start
    from trimmed l
    left join premise p on p.premise_id = l.premise_id
),
-- The offset test and parse are done once per row here (the hot path of a large lake);
-- the rules are those of the utc_instant and local_time_* macros in schema.sql. Wall-clock
-- text is parsed only where there is no offset.
typed as (
    select
        * exclude (typed_interval_start),
        case when not has_offset then try_cast(interval_text as timestamp) end as wall_clock,
        coalesce(
            typed_interval_start,
            case
                when has_offset then try_cast(interval_text as timestamptz)
                else timezone(timezone, try_cast(interval_text as timestamp))
            end
        ) as interval_start_utc
    from parsed
),
row_checked as materialized (
    select
        *,
        case
            when premise_id is null then 'missing_key'
            when not premise_known then 'unknown_premise'
            when interval_start_utc is null and (interval_text is null or interval_text = '')
                then 'missing_timestamp'
            when interval_start_utc is null then 'bad_timestamp'
            when not has_offset and timezone(timezone, interval_start_utc) <> wall_clock
                then 'nonexistent_local_time'
            when not has_offset
                and (timezone(timezone, interval_start_utc - interval 1 hour) = wall_clock
                    or timezone(timezone, interval_start_utc + interval 1 hour) = wall_clock)
                then 'ambiguous_local_time'
            when interval_minutes is null or interval_minutes not in (15, 30, 60) then 'bad_interval_length'
            -- On the UTC clock or on the local one (they differ in zones offset by part of an hour).
            when epoch(interval_start_utc)::bigint % (interval_minutes * 60) <> 0
                and epoch(timezone(timezone, interval_start_utc))::bigint % (interval_minutes * 60) <> 0
                then 'interval_not_aligned'
            when kwh is null or isnan(kwh) then 'bad_number'
            when kwh < 0 or kwh > $max_kw * interval_minutes / 60.0 then 'kwh_out_of_range'
            when quality not in ('actual', 'estimated') then 'bad_code'
        end as row_reason
    from typed
),
-- Keys quarantined as conflicts, parsed back from their text (premise_id|instant): the few
-- keys are parsed rather than every row's key formatted.
conflict_keys as (
    select distinct
        regexp_extract(record_key, '^(.*)\|[^|]*$', 1) as premise_id,
        try_cast(regexp_extract(record_key, '\|([^|]*)$', 1) as timestamptz) as interval_start_utc
    from quarantine
    where reason = 'conflicting_duplicate' and record_key is not null
),
-- Keys given more than once in this file (usually none): a grouped count, not a window
-- per key, which would sort every row.
repeated_keys as (
    select
        premise_id,
        interval_start_utc,
        min(kwh) <> max(kwh) or min(interval_minutes) <> max(interval_minutes) as key_conflict,
        min(source_row) as first_row
    from row_checked
    where row_reason is null
    group by premise_id, interval_start_utc
    having count(*) > 1
),
keyed as (
    select
        r.*,
        coalesce(d.key_conflict, false) as key_conflict,
        d.first_row is not null and d.first_row <> r.source_row as key_repeat,
        m.kwh is not null and (m.kwh <> r.kwh or m.interval_minutes <> r.interval_minutes) as loaded_conflict,
        m.kwh is not null as loaded_same_key,
        c.premise_id is not null as known_conflict
    from row_checked r
    left join repeated_keys d
        on r.row_reason is null
        and d.premise_id = r.premise_id
        and d.interval_start_utc = r.interval_start_utc
    left join meter_read m
        on r.row_reason is null
        and m.premise_id = r.premise_id
        and m.interval_start_utc = r.interval_start_utc
    left join conflict_keys c
        on r.row_reason is null
        and c.premise_id = r.premise_id
        and c.interval_start_utc = r.interval_start_utc
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
        premise_id, interval_start_utc, interval_minutes, kwh, quality, source_row,
        case when reason = 'conflicting_duplicate' then concat_ws('|', premise_id, interval_start_utc) end
            as record_key,
        loaded_conflict, reason
    from judged
)
select * from checked
