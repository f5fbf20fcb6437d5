-- One row per enrolled premise; key premise_id. Its cohort, the away episodes found and used,
-- and the commonest reason its episodes were left out (ties by name), so a home the
-- recommendation cannot evaluate is counted with why instead of vanishing from the totals.
with premises as (
    select premise_id, cohort from premise
),
episodes as (
    select premise_id, excluded_reason from episode
),
found as (
    select
        premise_id,
        count(*) as episodes_found,
        count(*) filter (excluded_reason is null) as episodes_used
    from episodes
    group by premise_id
),
reasons as (
    select premise_id, excluded_reason, count(*) as n
    from episodes
    where excluded_reason is not null
    group by premise_id, excluded_reason
),
commonest as (
    select premise_id, arg_max(excluded_reason, (n, excluded_reason)) as exclusion
    from reasons
    group by premise_id
),
covered as (
    select
        p.premise_id,
        p.cohort,
        coalesce(f.episodes_found, 0) as episodes_found,
        coalesce(f.episodes_used, 0) as episodes_used,
        c.exclusion
    from premises p
    left join found f using (premise_id)
    left join commonest c using (premise_id)
)
select * from covered order by premise_id
