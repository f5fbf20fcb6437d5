-- Analyst views of the decision: recommendations, their totals, schedules, comfort beside cost,
-- and where the estimators disagree. Run after views.sql (pipeline.store.connect_ledger does),
-- whose published() macro and latest_run they use, so only whole runs show and each *_latest
-- view shows only the newest. Every saving here is measured against the residents' current behaviour, not a thermostat left alone.
-- A view over a table no run has written yet (schedule, before the schedule stage exists in a
-- ledger) is left out by connect_ledger and appears once a run writes that table.

-- Every published run's recommendation; one row per run, premise and mode.
create or replace view recommendation as
    select * from published('recommendation');

-- Every published run's totals; one row per run, scope (cohort / program), key, mode,
-- decision, policy and reason.
create or replace view recommendation_total as
    select * from published('recommendation_total');

-- Every published run's schedules (what a thermostat would be told); one row per run,
-- premise, policy and slot.
create or replace view schedule as
    select * from published('schedule');

-- The newest whole run: one row, with when it ran, the code and the newest meter read it saw,
-- so every figure of the *_latest views can be traced to its run.
create or replace view run_latest as
    select run_id, started_at, finished_at, code_version, data_watermark, row_counts
    from run semi join latest_run using (run_id);

-- The newest run's recommendation; one row per premise and mode (mode null for homes with no
-- usable episode). decision 'send' names the policy; 'keep current' gives the reason.
create or replace view recommendation_latest as
    select
        premise_id,
        cohort,
        mode,
        decision,
        policy,
        reason,
        reason_detail,
        nearest_policy,
        round(nearest_lower_bound_usd, 3) as nearest_lower_bound_usd,
        n_episodes,
        round(bill_lower_bound_usd, 3) as bill_lower_bound_usd,
        round(bill_savings_usd_per_episode, 3) as bill_savings_usd_per_episode,
        days_observed,
        season_days,
        round(episodes_per_year, 1) as episodes_per_year,
        round(bill_savings_usd_annual, 2) as bill_savings_usd_annual,
        round(bill_ci_low_annual, 2) as bill_ci_low_annual,
        round(bill_ci_high_annual, 2) as bill_ci_high_annual,
        round(savings_kwh_annual, 1) as savings_kwh_annual,
        round(comfort_change_degree_hours_annual, 1) as comfort_change_degree_hours_annual,
        baseline
    from recommendation semi join latest_run using (run_id)
    order by premise_id, mode;

-- The newest run's totals per cohort and for the program; one row per scope, key, mode,
-- decision, policy and reason: homes, annual bill USD and kWh saved with intervals (sums over
-- the homes that get the policy; null for homes kept on current behaviour).
create or replace view program_totals as
    select
        scope,
        key,
        mode,
        decision,
        policy,
        reason,
        homes,
        round(bill_savings_usd_annual, 0) as bill_savings_usd_annual,
        round(bill_ci_low_annual, 0) as bill_ci_low_annual,
        round(bill_ci_high_annual, 0) as bill_ci_high_annual,
        round(savings_kwh_annual, 0) as savings_kwh_annual,
        round(savings_kwh_ci_low_annual, 0) as savings_kwh_ci_low_annual,
        round(savings_kwh_ci_high_annual, 0) as savings_kwh_ci_high_annual,
        round(comfort_change_degree_hours_annual, 1) as comfort_change_degree_hours_annual,
        baseline
    from recommendation_total semi join latest_run using (run_id)
    order by scope desc, key, mode, decision desc, policy, reason;

-- The newest run's schedules: the setpoints each recommended premise's thermostat would be told.
create or replace view schedule_latest as
    select s.* exclude (run_id) from schedule s semi join latest_run using (run_id);

-- Savings and comfort side by side per cohort and for the portfolio, newest run, recommended
-- estimator; one row per policy, mode, scope and key. The penalised saving, the bill alone and
-- the comfort cost (°C-hours of setback in force after the return, and priced) each with its
-- interval; 'insufficient_evidence' rows carry no figures of their own.
create or replace view savings_comfort_by_cohort as
    select
        scope,
        key,
        policy_name,
        mode,
        status,
        n_episodes,
        round(savings_usd_per_episode, 3) as savings_usd_per_episode,
        round(ci_low, 3) as ci_low,
        round(ci_high, 3) as ci_high,
        round(bill_savings_usd_per_episode, 3) as bill_savings_usd_per_episode,
        round(bill_ci_low, 3) as bill_ci_low,
        round(bill_ci_high, 3) as bill_ci_high,
        round(comfort_degree_hours_behavior, 3) as comfort_degree_hours_behavior,
        round(comfort_degree_hours_policy, 3) as comfort_degree_hours_policy,
        round(comfort_degree_hours_ci_low, 3) as comfort_degree_hours_ci_low,
        round(comfort_degree_hours_ci_high, 3) as comfort_degree_hours_ci_high,
        round(comfort_cost_usd_policy, 4) as comfort_cost_usd_policy,
        round(comfort_cost_usd_ci_low, 4) as comfort_cost_usd_ci_low,
        round(comfort_cost_usd_ci_high, 4) as comfort_cost_usd_ci_high,
        round(comfort_change_degree_hours, 3) as comfort_change_degree_hours,
        days_observed,
        season_days,
        round(episodes_per_year, 1) as episodes_per_year,
        round(bill_savings_usd_annual, 2) as bill_savings_usd_annual
    from savings_latest
    where scope in ('cohort', 'portfolio') and recommended
    order by scope desc, key, policy_name, mode;

-- Where the estimators disagree, newest run: one row per policy, mode, scope and key with
-- the spread of the estimators' savings per episode and whether their intervals share a point.
-- A wide spread or no common point means the number depends on the method: read it with care.
create or replace view estimator_disagreement as
    select
        policy_name,
        mode,
        scope,
        key,
        count(savings_usd_per_episode) as estimators_with_figure,
        round(min(savings_usd_per_episode), 3) as lowest_savings_usd,
        round(max(savings_usd_per_episode), 3) as highest_savings_usd,
        round(max(savings_usd_per_episode) - min(savings_usd_per_episode), 3) as spread_usd,
        arg_min(estimator, savings_usd_per_episode) as lowest_estimator,
        arg_max(estimator, savings_usd_per_episode) as highest_estimator,
        max(ci_low) <= min(ci_high) as intervals_overlap
    from savings_latest
    group by policy_name, mode, scope, key
    having count(savings_usd_per_episode) >= 2
    order by spread_usd desc, policy_name, mode, scope, key;
