-- Decision steps: one row per (episode_id, t) of every usable episode; key (episode_id, t).
-- A step runs from one decision point to the next: every step_hours away hours, or (when
-- anchored) at departure, where the price tier rises, and one hour before the return,
-- because importance weights multiply across decisions and fewer decisions keep them
-- tame. Offsets and actions are in the setback direction (a cooling setpoint raised, a
-- heating one lowered) so one policy serves both seasons; the last step also carries the
-- return and recovery hours, whose energy the episode caused, and the comfort penalty.
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
        case when e.mode = 'heat' then h.comfort_heat_c - h.indoor_end else h.indoor_end - h.comfort_cool_c end
            as indoor_excess_c,
        datediff('hour', e.start_utc, h.hour_utc) as hour_in_episode
    from episodes e
    join hours h
        on h.premise_id = e.premise_id and h.hour_utc >= e.start_utc and h.hour_utc < e.window_end_utc
),
away_hours as (
    select
        *,
        case
            when $anchored then
                hour_in_episode = 0
                or hour_in_episode = n_away_hours - 1
                or price_tier > lag(price_tier) over (partition by episode_id order by hour_utc)
            else hour_in_episode % $step_hours = 0
        end as is_decision
    from episode_hours
    where hour_in_episode < n_away_hours
),
numbered as (
    select
        *,
        (sum(is_decision::integer) over (
            partition by episode_id order by hour_utc rows between unbounded preceding and current row
        ) - 1)::integer as t
    from away_hours
),
last_steps as (
    select episode_id, max(t) as last_t from numbered group by episode_id
),
bucketed as (
    select n.*, false as in_recovery, (l.last_t + 1)::integer as n_steps
    from numbered n
    join last_steps l using (episode_id)
    union all by name
    select h.*, l.last_t as t, true as in_recovery, (l.last_t + 1)::integer as n_steps
    from episode_hours h
    join last_steps l using (episode_id)
    where h.hour_in_episode >= h.n_away_hours
),
steps as (
    select
        episode_id,
        any_value(premise_id) as premise_id,
        any_value(mode) as mode,
        t,
        any_value(n_steps) as n_steps,
        min(hour_utc) filter (not in_recovery) as step_start_utc,
        count(*) filter (not in_recovery) as step_hours,
        arg_min(local_hour, hour_utc) filter (not in_recovery) as local_hour,
        arg_min(outdoor_c, hour_utc) filter (not in_recovery) as outdoor_c,
        arg_min(price_tier, hour_utc) filter (not in_recovery) as price_tier,
        arg_min(offset_before_c, hour_utc) filter (not in_recovery) as offset_before_c,
        arg_max(offset_end_c, hour_utc) filter (not in_recovery) as offset_end_c,
        arg_min(indoor_excess_c, hour_utc) filter (in_recovery) as return_indoor_excess_c,
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
-- Degrees outside comfort at the return: the indoor reading when asked for and logged,
-- else the setback still in force, times the recovery hours (comfort_degree_hours, kept
-- apart so comfort can be estimated on its own); priced per degree-hour into the reward.
discomfort as (
    select
        *,
        case when t = n_steps - 1
            then $recovery_hours * greatest(
                case when $indoor_basis then coalesce(return_indoor_excess_c, offset_end_c) else offset_end_c end,
                0
            )
            else 0.0
        end as comfort_degree_hours
    from actions
),
penalised as (
    select *, $penalty_usd * comfort_degree_hours as comfort_penalty_usd
    from discomfort
),
rewarded as (
    select *, -(cost_usd + recovery_cost_usd + comfort_penalty_usd) as reward
    from penalised
)
select * from rewarded
