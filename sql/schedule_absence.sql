-- Usual absence of each premise: one row per (premise_id, mode, day_type) with usable episodes.
-- A thermostat is sent one plan per day type, so each premise's absences of a day type are
-- summed up as the most frequent departure hour (the earliest on a tie) and the median
-- number of away hours (the lower middle value, so it is a length the premise was seen away).
with usable as (
    select premise_id, mode, day_type, hour(start_local) as depart_hour, n_away_hours
    from episode
    where excluded_reason is null
),
departures as (
    select premise_id, mode, day_type, depart_hour, count(*) as n
    from usable
    group by all
),
usual_departure as (
    select premise_id, mode, day_type, arg_max(depart_hour, n * 24 + 23 - depart_hour) as depart_hour
    from departures
    group by all
),
usual_length as (
    select premise_id, mode, day_type, quantile_disc(n_away_hours, 0.5) as away_hours, count(*) as n_episodes
    from usable
    group by all
),
joined as (
    select d.premise_id, d.mode, d.day_type, d.depart_hour::integer as depart_hour,
           l.away_hours::integer as away_hours, l.n_episodes
    from usual_departure d
    join usual_length l using (premise_id, mode, day_type)
)
select * from joined
