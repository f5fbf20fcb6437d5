-- The shards of the episode stage: consecutive premises in premise-id order,
-- $shard_premises to a shard; key shard_id. Beside each shard, what its fingerprint
-- hashes: its premises' own rows with their numbers, and the landing files that hold
-- its premises' meter and thermostat rows, each with its content hash.
with numbered as (
    select *, premise_number - 1 as premise_index
    from premise
    join premise_order using (premise_id)
),
cut as (
    select *, premise_index // $shard_premises as shard_id
    from numbered
),
files as (
    select distinct premise_id, source_file from meter_read
    union
    select distinct premise_id, source_file from thermostat_event
),
shard_files as (
    select distinct c.shard_id, f.source_file
    from files f
    join cut c using (premise_id)
),
hashed as (
    select s.shard_id, string_agg(s.source_file || ':' || l.content_hash, ';' order by s.source_file) as files
    from shard_files s
    join ingest_log l using (source_file)
    group by all
)
select
    c.shard_id,
    min(c.premise_id) as first_premise,
    max(c.premise_id) as last_premise,
    count(*) as n_premises,
    string_agg(
        concat_ws('|', c.premise_number, c.premise_id, c.timezone, c.weather_station_id, c.rate_plan_id,
                  c.comfort_cool_c, c.comfort_heat_c, c.cohort, c.floor_area_m2),
        ';' order by c.premise_id
    ) as premise_rows,
    coalesce(any_value(h.files), '') as files
from cut c
left join hashed h using (shard_id)
group by c.shard_id
order by c.shard_id
