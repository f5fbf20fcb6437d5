-- One row per used episode (key episode_id): sums over the hours of its window (away hours,
-- return hour and recovery hours) of quantities no setpoint choice can change, the price and
-- the price times the outdoor temperature past the premise's comfort setpoint of the mode.
-- The improve stage regresses episode returns on them (learning part only) as the control
-- variate of its safety test; actions cannot move them, so E_b[(rho - 1) f] = 0 for them.
select
    e.episode_id,
    sum(h.price_usd_per_kwh) as price_hours,
    sum(
        h.price_usd_per_kwh * greatest(
            case when e.mode = 'heat' then h.comfort_heat_c - h.outdoor_c else h.outdoor_c - h.comfort_cool_c end,
            0
        )
    ) as price_degree_hours
from episode e
join hourly h
    on h.premise_id = e.premise_id and h.hour_utc >= e.start_utc and h.hour_utc < e.window_end_utc
where e.excluded_reason is null
group by e.episode_id
order by e.episode_id
