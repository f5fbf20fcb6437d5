-- Grain: one row per (premise_id, hour) of the meter Parquet files, read once.
-- The benchmark's floor: the least work any pipeline must do to turn 15-minute reads
-- into premise-hours (no checks, no grid, no joins), so a run can be compared with it.
-- The hour is cut with the same microsecond arithmetic as the pipeline's utc_hour macro
-- (spelled out: the floor runs in a bare database), the fastest way DuckDB offers.
select premise_id,
       make_timestamptz((epoch_us(interval_start::timestamptz) // 3600000000) * 3600000000) as hour,
       sum(kwh) as kwh
from read_parquet($meter_glob)
group by all
