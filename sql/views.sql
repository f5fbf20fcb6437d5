-- Analyst views over the Parquet ledger: one view per ledger table (every run), plus
-- *_latest views holding only the newest run, so a query never mixes runs by accident.
-- Before running this file set the ledger folder, e.g. in the duckdb shell:
--     set variable ledger_root = '/path/to/out/ledger';
-- (pipeline.store.connect_ledger does this for you from Python.)
-- Files are read with union_by_name so runs written before a column was added still read
-- (their rows give null there).
create or replace view run as
    select * from read_parquet(getvariable('ledger_root') || '/run/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view savings as
    select * from read_parquet(getvariable('ledger_root') || '/savings/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view policy as
    select * from read_parquet(getvariable('ledger_root') || '/policy/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view behavior_policy as
    select * from read_parquet(
        getvariable('ledger_root') || '/behavior_policy/*/*.parquet', hive_partitioning = true, union_by_name = true
    );
create or replace view behavior_type as
    select * from read_parquet(
        getvariable('ledger_root') || '/behavior_type/*/*.parquet', hive_partitioning = true, union_by_name = true
    );
create or replace view diagnostics as
    select * from read_parquet(getvariable('ledger_root') || '/diagnostics/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view episode_summary as
    select * from read_parquet(
        getvariable('ledger_root') || '/episode_summary/*/*.parquet', hive_partitioning = true, union_by_name = true
    );
create or replace view state_value as
    select * from read_parquet(getvariable('ledger_root') || '/state_value/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view horizon as
    select * from read_parquet(getvariable('ledger_root') || '/horizon/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view state_lookup as
    select * from read_parquet(getvariable('ledger_root') || '/state_lookup/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view shard_work as
    select * from read_parquet(getvariable('ledger_root') || '/shard_work/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view stage_work as
    select * from read_parquet(getvariable('ledger_root') || '/stage_work/*/*.parquet', hive_partitioning = true, union_by_name = true);
create or replace view latest_run as
    select run_id from run order by finished_at desc limit 1;
create or replace view savings_latest as
    select s.* from savings s semi join latest_run using (run_id);
-- The recommended estimate per premise; 'insufficient_evidence' rows carry no savings figure of
-- their own, per episode or annual (the cohort-shrunk figures stay, with their shrinkage).
create or replace view savings_by_premise as
    select
        key as premise_id,
        policy_name,
        mode,
        estimator,
        status,
        n_episodes,
        round(savings_usd_per_episode, 3) as savings_usd_per_episode,
        round(ci_low, 3) as ci_low,
        round(ci_high, 3) as ci_high,
        round(lower_bound_usd, 3) as lower_bound_usd,
        round(lower_bound_bootstrap_usd, 3) as lower_bound_bootstrap_usd,
        round(shrunk_savings_usd_per_episode, 3) as shrunk_savings_usd_per_episode,
        round(shrinkage, 2) as shrinkage,
        round(ess, 1) as ess,
        support_ok,
        round(episodes_per_year, 1) as episodes_per_year,
        round(savings_usd_annual, 2) as savings_usd_annual,
        round(savings_kwh_annual, 1) as savings_kwh_annual,
        round(shrunk_savings_usd_annual, 2) as shrunk_savings_usd_annual,
        round(shrunk_savings_kwh_annual, 1) as shrunk_savings_kwh_annual
    from savings_latest
    where scope = 'premise' and recommended
    order by premise_id, policy_name, mode;
-- ---- learned policies and their safety test (the improve stage) ----
create or replace view safety_test as
    select * from read_parquet(getvariable('ledger_root') || '/safety_test/*/*.parquet', hive_partitioning = true, union_by_name = true);
-- Per mode and scope of the latest run: was a learned policy proposed, and why (not).
create or replace view safety_test_latest as
    select
        policy_name,
        mode,
        scope,
        key,
        outcome,
        reason,
        learner,
        bound_method,
        n_held_out_episodes,
        round(savings_estimate_usd, 3) as savings_estimate_usd,
        round(lower_bound_usd, 3) as lower_bound_usd,
        round(comfort_change_usd, 3) as comfort_change_usd
    from safety_test semi join latest_run using (run_id)
    order by mode, scope, key;
-- The learned policies a recommendation may send: the latest run's policy rows with proposed = true.
create or replace view proposed_policy as
    select p.* from policy p semi join latest_run using (run_id)
    where p.proposed;
