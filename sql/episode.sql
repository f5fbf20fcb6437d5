-- Away episodes: one row per contiguous run of fully-away hours of one premise;
-- key episode_id. Every candidate run is kept, with excluded_reason set when it may
-- not be used, so an analyst can see what was left out and why. The window charged to
-- an episode runs from its first away hour through the return hour and the recovery
-- hours after it. Episodes from an assumed schedule are kept only where the meter
-- agrees that the home used less in those hours on weekdays than on weekends.
with hours as (
    select * from hourly
),
numbered as (
    select
        *,
        row_number() over (partition by premise_id order by hour_utc) as hour_index
    from hours
),
schedule_check as (
    select
        premise_id,
        avg(kwh) filter (day_type = 'weekday' and local_hour >= $schedule_from and local_hour < $schedule_to)
            / nullif(avg(kwh) filter (
                day_type = 'weekend' and local_hour >= $schedule_from and local_hour < $schedule_to
            ), 0) as schedule_load_ratio
    from hours
    where presence_source = 'schedule' and minutes_read = 60
    group by all
),
away_runs as (
    select
        *,
        hour_index - row_number() over (partition by premise_id order by hour_utc) as run_key
    from numbered
    where away_full
),
runs as (
    select
        premise_id,
        min(hour_utc) as start_utc,
        max(hour_utc) + interval 1 hour as return_hour_utc,
        count(*) as n_away_hours,
        min(hour_index) as first_index,
        max(hour_index) as last_index
    from away_runs
    group by premise_id, run_key
),
windows as (
    select
        r.*,
        r.return_hour_utc + to_hours(1 + $recovery_hours) as window_end_utc,
        count(h.hour_utc) as window_hours,
        count(h.hour_utc) filter (h.minutes_read < 60) as short_hours,
        count(h.hour_utc) filter (h.price_usd_per_kwh is null) as unpriced_hours,
        count(h.hour_utc) filter (h.outdoor_c is null) as unweathered_hours,
        count(h.hour_utc) filter (h.mode_changed) as mode_change_hours,
        count(distinct h.mode_end) as modes,
        any_value(h.mode_end) as mode,
        bool_or(h.hour_utc = r.start_utc and h.cool_before is null and h.heat_before is null) as no_setting
    from runs r
    left join hours h
        on h.premise_id = r.premise_id
        and h.hour_utc >= r.start_utc
        and h.hour_utc < r.return_hour_utc + to_hours(1 + $recovery_hours)
    group by all
),
first_hours as (
    select premise_id, hour_utc as start_utc, local_ts as start_local, day_type, mode_before, presence_source
    from hours
),
labelled as (
    select
        w.premise_id,
        w.start_utc,
        f.start_local,
        f.day_type,
        w.return_hour_utc,
        w.window_end_utc,
        w.n_away_hours,
        w.mode,
        f.presence_source,
        case
            when not list_contains($presence_sources, f.presence_source) then 'presence_source_not_used'
            when w.window_hours < w.n_away_hours + 1 + $recovery_hours then 'open_at_data_end'
            when w.short_hours > 0 then 'data_gap'
            when w.unpriced_hours > 0 then 'missing_price'
            when w.unweathered_hours > 0 then 'missing_weather'
            when w.no_setting then 'no_thermostat_setting'
            when w.modes > 1 or w.mode_change_hours > 0 or f.mode_before <> w.mode then 'mode_change'
            when w.mode = 'off' then 'system_off'
            when f.presence_source = 'schedule' and coalesce(c.schedule_load_ratio >= $schedule_max_ratio, true)
                then 'implausible_schedule'
            when w.n_away_hours < $min_hours then 'too_short'
            when w.n_away_hours > $max_hours then 'too_long'
        end as excluded_reason
    from windows w
    join first_hours f using (premise_id, start_utc)
    left join schedule_check c using (premise_id)
),
-- The premise's number times $episodes_per_premise plus the episode's rank in the premise:
-- the same id whatever shard the premise is built in.
identified as (
    select
        o.premise_number * $episodes_per_premise
            + row_number() over (partition by l.premise_id order by l.start_utc) as episode_id,
        l.*
    from labelled l
    join premise_order o using (premise_id)
)
select * from identified
