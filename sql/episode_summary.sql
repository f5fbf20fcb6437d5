-- One row per candidate episode, used or excluded (with its reason): start, steps, return,
-- kWh, comfort penalty and its °C-hours summed over its decision steps; key episode_id. The ledger's
-- episode_summary table.
with used as (
    select
        episode_id,
        count(*) as n_steps,
        coalesce(sum(reward), 0) as return_usd,
        coalesce(sum(kwh), 0) + coalesce(sum(recovery_kwh), 0) as kwh,
        coalesce(sum(comfort_penalty_usd), 0) as comfort_penalty_usd,
        coalesce(sum(comfort_degree_hours), 0) as comfort_degree_hours
    from step
    group by episode_id
)
select
    e.premise_id,
    e.episode_id,
    e.start_utc,
    e.day_type,
    e.mode,
    e.presence_source,
    e.n_away_hours,
    coalesce(u.n_steps, 0) as n_steps,
    u.return_usd,
    u.kwh,
    u.comfort_penalty_usd,
    u.comfort_degree_hours,
    e.excluded_reason
from episode e
left join used u using (episode_id)
order by e.episode_id
