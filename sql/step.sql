-- Decision steps: one row per (episode_id, t) of every usable episode; key (episode_id, t).
-- A step is step_hours consecutive away hours. Offsets and actions are in the setback
-- direction (a cooling setpoint raised, a heating one lowered) so one policy serves both
-- seasons; the last step also carries the return and recovery hours, whose energy the
-- episode caused, and the comfort penalty.
with episodes as (
    select * from episode where excluded_reason is null
),
hours as (
    select * from hourly
),
episode_hours as (
    select
        e.episode_id,
        e.premise_id,
        e.mode,
        e.n_away_hours,
        h.hour_utc,
        h.local_hour,
        h.kwh,
        h.price_usd_per_kwh,
        h.price_tier,
        h.outdoor_c,
        case when e.mode = 'heat' then h.comfort_heat_c - h.heat_before else h.cool_before - h.comfort_cool_c end
            as offset_before_c,
        case when e.mode = 'heat' then h.comfort_heat_c - h.heat_end else h.cool_end - h.comfort_cool_c end
            as offset_end_c,
        datediff('hour', e.start_utc, h.hour_utc) as hour_in_episode
    from episodes e
    join hours h
        on h.premise_id = e.premise_id and h.hour_utc >= e.start_utc and h.hour_utc < e.window_end_utc
),
bucketed as (
    select
        *,
        least(hour_in_episode, n_away_hours - 1) // $step_hours as t,
        hour_in_episode >= n_away_hours as in_recovery,
        ceil(n_away_hours / $step_hours)::integer as n_steps
    from episode_hours
),
steps as (
    select
        episode_id,
        any_value(premise_id) as premise_id,
        any_value(mode) as mode,
        t,
        any_value(n_steps) as n_steps,
        min(hour_utc) as step_start_utc,
        arg_min(local_hour, hour_utc) as local_hour,
        arg_min(outdoor_c, hour_utc) as outdoor_c,
        arg_min(price_tier, hour_utc) as price_tier,
        arg_min(offset_before_c, hour_utc) as offset_before_c,
        arg_max(offset_end_c, hour_utc) filter (not in_recovery) as offset_end_c,
        sum(kwh) filter (not in_recovery) as kwh,
        sum(kwh * price_usd_per_kwh) filter (not in_recovery) as cost_usd,
        coalesce(sum(kwh) filter (in_recovery), 0) as recovery_kwh,
        coalesce(sum(kwh * price_usd_per_kwh) filter (in_recovery), 0) as recovery_cost_usd
    from bucketed
    group by episode_id, t
),
actions as (
    select
        *,
        n_steps - t as steps_left,
        offset_end_c - offset_before_c as change_c,
        greatest($action_min, least($action_max, round(offset_end_c - offset_before_c)))::integer as action,
        round(offset_end_c - offset_before_c) not between $action_min and $action_max as action_clipped
    from steps
),
rewarded as (
    select
        *,
        case when t = n_steps - 1
            then $penalty_usd * greatest(offset_end_c, 0) * $recovery_hours
            else 0.0
        end as comfort_penalty_usd,
        -(cost_usd + recovery_cost_usd
          + case when t = n_steps - 1 then $penalty_usd * greatest(offset_end_c, 0) * $recovery_hours else 0.0 end)
            as reward
    from actions
)
select * from rewarded
