-- The hourly grid: one row per premise and UTC hour over the premise's metered span;
-- key (premise_id, hour_utc). Every later stage reads hours from here, so gaps stay
-- visible (minutes_read < 60) instead of disappearing, and meter kWh is conserved.
-- Whether an hour was fully away comes from the best evidence the premise has: its
-- thermostat's occupancy flag; else a setback held through the hour (an away hold);
-- else the configured weekday schedule, which episode.sql checks against the load.
with premises as (
    select * from premise
),
reads as (
    select premise_id, hour_utc, kwh, minutes_read
    from meter_hours()
),
spans as (
    select premise_id, min(hour_utc) as first_hour, max(hour_utc) as last_hour
    from reads
    group by all
),
grid as (
    select premise_id, unnest(generate_series(first_hour, last_hour, interval 1 hour)) as hour_utc
    from spans
),
local_grid as (
    select
        g.premise_id,
        g.hour_utc,
        timezone(p.timezone, g.hour_utc) as local_ts,
        p.weather_station_id,
        p.rate_plan_id,
        p.comfort_cool_c,
        p.comfort_heat_c,
        p.cohort
    from grid g
    join premises p using (premise_id)
),
weather as (
    select station_id, utc_hour(observed_at_utc) as hour_utc, avg(dry_bulb_c) as outdoor_c
    from weather_obs
    group by all
),
tiers as (
    select *, dense_rank() over (partition by rate_plan_id order by price_per_kwh) - 1 as price_tier
    from tariff_rate
),
events as (
    select * from thermostat_event
),
-- Occupancy is read only from events that report it; setpoints from every event.
presence as (
    select premise_id, changed_at_utc, occupied, source_row
    from events
    where occupied is not null
),
with_meter as (
    select lg.*, coalesce(r.kwh, 0) as kwh, coalesce(r.minutes_read, 0) as minutes_read
    from local_grid lg
    left join reads r using (premise_id, hour_utc)
),
with_weather as (
    select m.*, w.outdoor_c
    from with_meter m
    left join weather w on w.station_id = m.weather_station_id and w.hour_utc = m.hour_utc
),
with_price as (
    select
        w.*,
        t.price_per_kwh as price_usd_per_kwh,
        t.price_tier
    from with_weather w
    left join tiers t
        on t.rate_plan_id = w.rate_plan_id
        and t.day_type = case when isodow(w.local_ts) >= 6 then 'weekend' else 'weekday' end
        and hour(w.local_ts) >= t.start_hour and hour(w.local_ts) < t.end_hour
        and case
            when t.month_from <= t.month_to then month(w.local_ts) between t.month_from and t.month_to
            else month(w.local_ts) >= t.month_from or month(w.local_ts) <= t.month_to
        end
),
-- The setting just before the hour starts, and the one in force when it ends.
setting_before as (
    select h.premise_id, h.hour_utc, e.mode as mode_before, e.cool_setpoint_c as cool_before,
           e.heat_setpoint_c as heat_before
    from grid h
    asof left join events e on e.premise_id = h.premise_id and e.changed_at_utc < h.hour_utc
),
setting_end as (
    select h.premise_id, h.hour_utc, e.mode as mode_end, e.cool_setpoint_c as cool_end,
           e.heat_setpoint_c as heat_end, e.indoor_c as indoor_end
    from grid h
    asof left join events e
        on e.premise_id = h.premise_id and e.changed_at_utc < h.hour_utc + interval 1 hour
),
presence_start as (
    select h.premise_id, h.hour_utc, p.occupied as occupied_at_start
    from grid h
    asof left join presence p on p.premise_id = h.premise_id and p.changed_at_utc <= h.hour_utc
),
-- Which evidence of absence each premise has.
presence_kind as (
    select
        p.premise_id,
        case
            when bool_or(e.occupied is not null) then 'occupancy_flag'
            when bool_or(
                (e.mode = 'cool' and e.cool_setpoint_c >= p.comfort_cool_c + 1)
                or (e.mode = 'heat' and e.heat_setpoint_c <= p.comfort_heat_c - 1)
            ) then 'setback_hold'
            else 'schedule'
        end as presence_source
    from premises p
    left join events e using (premise_id)
    group by all
),
presence_within as (
    select e.premise_id, utc_hour(e.changed_at_utc) as hour_utc,
           bool_or(e.occupied) as returned_within, count(distinct e.mode) as modes_within
    from events e
    group by all
),
assembled as (
    select
        h.premise_id,
        h.hour_utc,
        h.local_ts,
        cast(h.local_ts as date) as local_date,
        hour(h.local_ts) as local_hour,
        case when isodow(h.local_ts) >= 6 then 'weekend' else 'weekday' end as day_type,
        h.cohort,
        h.comfort_cool_c,
        h.comfort_heat_c,
        h.kwh,
        h.minutes_read,
        h.outdoor_c,
        h.price_usd_per_kwh,
        h.price_tier,
        b.mode_before,
        b.cool_before,
        b.heat_before,
        e.mode_end,
        e.cool_end,
        e.heat_end,
        e.indoor_end,
        coalesce(b.mode_before <> e.mode_end, false) or coalesce(pw.modes_within, 0) > 1 as mode_changed,
        ps.occupied_at_start,
        k.presence_source,
        case k.presence_source
            when 'occupancy_flag' then
                coalesce(ps.occupied_at_start = false and not coalesce(pw.returned_within, false), false)
            when 'setback_hold' then
                coalesce(
                    isodow(h.local_ts) < 6
                    and hour(h.local_ts) >= $hold_from and hour(h.local_ts) < $hold_to
                    and b.mode_before = e.mode_end
                    and case e.mode_end
                        when 'cool' then e.cool_end >= h.comfort_cool_c + 1
                        when 'heat' then e.heat_end <= h.comfort_heat_c - 1
                        else false
                    end,
                    false
                )
            else isodow(h.local_ts) < 6 and hour(h.local_ts) >= $schedule_from and hour(h.local_ts) < $schedule_to
        end as away_full
    from with_price h
    left join setting_before b using (premise_id, hour_utc)
    left join setting_end e using (premise_id, hour_utc)
    left join presence_start ps using (premise_id, hour_utc)
    left join presence_within pw using (premise_id, hour_utc)
    left join presence_kind k using (premise_id)
)
select * from assembled
