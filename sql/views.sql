-- Analyst views over the Parquet ledger: one view per ledger table (every run), plus
-- *_latest views holding only the newest run, so a query never mixes runs by accident.
-- Before running this file set the ledger folder, e.g. in the duckdb shell:
--     set variable ledger_root = '/path/to/out/ledger';
-- (pipeline.store.connect_ledger does this for you from Python.)
-- Files are read with union_by_name so runs written before a column was added still read
-- (their rows give null there).
-- Only published runs are visible: a run is published by its `run` record, written after
-- every other table of the run, so the rows of a run killed part-way never reach a view.
create or replace macro ledger_files(tbl) as table
    select * from read_parquet(
        getvariable('ledger_root') || '/' || tbl || '/*/*.parquet', hive_partitioning = true, union_by_name = true
    );
create or replace macro published(tbl) as table
    select * from ledger_files(tbl) where run_id in (select run_id from run);
create or replace view run as
    select * from ledger_files('run');
create or replace view savings as
    select * from published('savings');
create or replace view policy as
    select * from published('policy');
create or replace view behavior_policy as
    select * from published('behavior_policy');
create or replace view behavior_type as
    select * from published('behavior_type');
create or replace view diagnostics as
    select * from published('diagnostics');
create or replace view episode_summary as
    select * from published('episode_summary');
create or replace view state_value as
    select * from published('state_value');
create or replace view horizon as
    select * from published('horizon');
create or replace view state_lookup as
    select * from published('state_lookup');
create or replace view shard_work as
    select * from published('shard_work');
create or replace view stage_work as
    select * from published('stage_work');
-- Program savings of each program-wide policy as episodes accumulate (in the order they
-- happened): ordinary and weighted IS with normal-approximation bands (pipeline/convergence.py).
create or replace view estimate_path as
    select * from published('estimate_path');
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
-- Runs killed part-way that a later run found and removed (one row per abandoned run id,
-- with the tables it had written); `run_id` is the run that removed them.
create or replace view abandoned_run as
    select * from published('abandoned_run');
-- ---- learned policies and their safety test (the improve stage) ----
create or replace view safety_test as
    select * from published('safety_test');
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
