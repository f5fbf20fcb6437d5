-- Analyst views over ledger/policy_truth, which `thermal-ledger truth` writes for simulated lakes
-- only (so store.connect_ledger runs this file only where that folder exists).
create or replace view policy_truth as
    select * from read_parquet(getvariable('ledger_root') || '/policy_truth/*/*.parquet', hive_partitioning = true, union_by_name = true);
-- How often each kind of number held against the truth, latest run: per kind and estimator.
create or replace view policy_truth_summary as
    select
        kind,
        estimator,
        count(*) as n_rows,
        count(covered) as n_intervals,
        avg(covered::int) as share_covered,
        count(bound_held) as n_bounds,
        avg(bound_held::int) as share_bound_held,
        avg(tightness_usd) as mean_tightness_usd
    from policy_truth semi join latest_run using (run_id)
    group by all
    order by kind, estimator;
