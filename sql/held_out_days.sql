-- One row per premise (key premise_id): local days observed from the first day of the held-out
-- part on, the improve stage's denominator for annualising held-out savings. The held-out part
-- starts at the episode start that leaves share $share of each mode's used episodes after it.
with used as (
    select mode, start_utc, row_number() over (partition by mode order by start_utc, episode_id) as n,
        count(*) over (partition by mode) as total
    from episode
    where excluded_reason is null
),
cut as (
    select min(start_utc) as held_out_from from used where n > round((1 - $share) * total)
)
select h.premise_id, p.cohort, count(distinct h.local_date) as days_observed
from hourly h
join premise p using (premise_id)
cross join cut
where h.hour_utc >= cut.held_out_from
group by all
