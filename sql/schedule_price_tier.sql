-- Usual price tier of each premise: one row per (premise_id, day_type, local_hour) with a price.
-- A schedule is per day type and hour, so an hour's tier is the one it had most often (the
-- lower on a tie): a time-of-use tariff's own tier, and the common one under dynamic prices.
with priced as (
    select premise_id, day_type, local_hour, price_tier, count(*) as n
    from hourly
    where price_tier is not null
    group by all
),
usual as (
    select premise_id, day_type, local_hour::integer as local_hour,
           arg_max(price_tier, n * 1000 - price_tier)::integer as price_tier
    from priced
    group by all
)
select * from usual
