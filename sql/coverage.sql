-- Meter coverage: one row per premise; key premise_id. Missing intervals are reported
-- here rather than filled, so an analyst sees which homes have holes before trusting
-- their episodes. Hours count as gaps by the same rule sql/episode.sql uses to exclude
-- an episode as data_gap (an hour with fewer than 60 minutes read), so the two agree.
with premises as (
    select premise_id from premise
),
reads as (
    select premise_id, interval_start_utc, interval_minutes, kwh
    from meter_read
),
hours as (
    select premise_id, hour_utc, minutes_read
    from meter_hours()
),
-- Per premise and interval length first (a few groups per premise on a narrow key), then
-- per premise: the most common length (the shorter on a tie) without a per-value count map.
lengths as (
    select
        premise_id,
        interval_minutes,
        min(interval_start_utc) as first_start,
        max(interval_start_utc) as last_start,
        count(*) as n,
        sum(kwh) as kwh
    from reads
    group by all
),
spans as (
    select
        premise_id,
        min(first_start) as first_interval_utc,
        max(last_start + to_minutes(interval_minutes)) as last_interval_end_utc,
        arg_max(interval_minutes, n * 100 - interval_minutes) as interval_minutes,
        sum(n)::bigint as intervals_present,
        sum(n * interval_minutes)::hugeint as minutes_present,
        sum(kwh) as kwh
    from lengths
    group by all
),
hour_counts as (
    select
        premise_id,
        count(*) as hours_with_reads,
        count(*) filter (minutes_read < 60) as partial_hours
    from hours
    group by all
),
summarised as (
    select
        p.premise_id,
        s.first_interval_utc,
        s.last_interval_end_utc,
        s.interval_minutes,
        coalesce((epoch(s.last_interval_end_utc) - epoch(s.first_interval_utc))::bigint // 60
            // s.interval_minutes, 0) as intervals_expected,
        coalesce(s.intervals_present, 0) as intervals_present,
        coalesce(s.minutes_present, 0) as minutes_present,
        coalesce(s.kwh, 0) as kwh,
        coalesce((epoch(date_trunc('hour', s.last_interval_end_utc - interval 1 microsecond))
            - epoch(date_trunc('hour', s.first_interval_utc)))::bigint // 3600 + 1, 0) as hours_in_span,
        coalesce(h.hours_with_reads, 0) as hours_with_reads,
        coalesce(h.partial_hours, 0) as partial_hours
    from premises p
    left join spans s using (premise_id)
    left join hour_counts h using (premise_id)
),
covered as (
    select
        *,
        hours_in_span - hours_with_reads + partial_hours as gap_hours,
        case
            when minutes_present = 0 then 0.0
            else round(100.0 * minutes_present
                / ((epoch(last_interval_end_utc) - epoch(first_interval_utc)) / 60.0), 3)
        end as coverage_pct
    from summarised
)
select * from covered
