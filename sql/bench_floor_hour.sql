-- Grain: one row per (premise_id, hour) of the meter Parquet files, read once.
-- The benchmark's floor: the least work any pipeline must do to turn 15-minute reads
-- into premise-hours (no checks, no grid, no joins), so a run can be compared with it.
select premise_id, date_trunc('hour', interval_start::timestamptz) as hour, sum(kwh) as kwh
from read_parquet($meter_glob)
group by all
