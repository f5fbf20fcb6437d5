"""The recommendation: each home's decision and reason, learned policies behind the safety test, totals."""

from __future__ import annotations

import math

import polars as pl
import pytest

from pipeline import recommend as rec
from pipeline.config import Config
from tests.test_evaluate import ledger_frame


def _row(premise, policy, **changes):
    """One premise savings row of the recommended estimator that passes every check unless changed."""
    row = {
        "scope": "premise",
        "key": premise,
        "policy_name": policy,
        "mode": "cool",
        "estimator": "weighted_is",
        "recommended": True,
        "status": "ok",
        "n_unsupported_steps": 0,
        "n_episodes": 40,
        "bill_savings_usd_per_episode": 0.5,
        "bill_ci_low": 0.2,
        "bill_ci_high": 0.8,
        "bill_lower_bound_usd": 0.25,
        "savings_kwh_per_episode": 2.0,
        "savings_kwh_ci_low": 1.0,
        "savings_kwh_ci_high": 3.0,
        "comfort_change_degree_hours": -0.5,
        "comfort_change_ci_high": -0.1,
        "days_observed": 80,
        "season_days": 120,
        "episodes_per_year": 60.0,
        "bill_savings_usd_annual": 30.0,
        "bill_ci_low_annual": 12.0,
        "bill_ci_high_annual": 48.0,
        "savings_kwh_annual": 120.0,
        "savings_kwh_ci_low_annual": 60.0,
        "savings_kwh_ci_high_annual": 180.0,
        "comfort_change_degree_hours_annual": -30.0,
    }
    return row | changes


PREMISES = pl.DataFrame(
    {
        "premise_id": ["A", "B", "C", "D", "E", "F", "G"],
        "cohort": ["north", "north", "north", "south", "south", "south", "south"],
        "exclusion": [None, None, None, None, None, None, "presence_source_not_used"],
    }
)


def _savings(rows):
    return pl.DataFrame(rows)


def _decided(rows, config=None, safety=None, premises=PREMISES):
    return rec.recommend(_savings(rows), premises, config or Config(), safety)


CASES = [
    # A: both eligible, the larger lower bound wins.
    _row("A", "deep", bill_lower_bound_usd=0.4),
    _row("A", "shallow", bill_lower_bound_usd=0.25),
    # B: one unsupported, one eligible.
    _row("B", "deep", n_unsupported_steps=3, status="insufficient_evidence", bill_lower_bound_usd=None),
    _row("B", "shallow", bill_lower_bound_usd=0.1),
    # C: one policy without support, one with thin evidence: thin evidence got further.
    _row("C", "deep", n_unsupported_steps=2, status="insufficient_evidence"),
    _row("C", "shallow", status="insufficient_evidence"),
    # D: bounds not above zero.
    _row("D", "deep", bill_lower_bound_usd=-0.2),
    _row("D", "shallow", bill_lower_bound_usd=0.0),
    # E: a positive bound but comfort would rise; another fails its bound: comfort is nearer.
    _row("E", "deep", bill_lower_bound_usd=0.6, comfort_change_ci_high=0.3),
    _row("E", "shallow", bill_lower_bound_usd=-0.1),
    # F: no support at all.
    _row("F", "deep", n_unsupported_steps=1, status="insufficient_evidence"),
]


def test_each_home_gets_the_eligible_policy_with_the_largest_bound_or_the_reason_it_keeps_current():
    """Hand-worked cases: largest bound wins; otherwise the reason of the policy that passed most checks."""
    homes = _decided(CASES).homes.sort("premise_id")
    got = {
        r["premise_id"]: (r["decision"], r["policy"], r["reason"], r["nearest_policy"])
        for r in homes.iter_rows(named=True)
    }
    assert got == {
        "A": ("send", "deep", "largest lower bound", None),
        "B": ("send", "shallow", "largest lower bound", None),
        "C": ("keep current", None, "thin evidence", "shallow"),
        "D": ("keep current", None, "bound not above zero", "shallow"),
        "E": ("keep current", None, "comfort", "deep"),
        "F": ("keep current", None, "no support", "deep"),
        "G": ("keep current", None, "no usable episodes", None),
    }
    g = homes.filter(pl.col("premise_id") == "G").row(0, named=True)
    assert g["reason_detail"] == "presence_source_not_used" and g["mode"] is None
    assert homes.filter(pl.col("premise_id") == "A")["policies_eligible"].item() == 2
    kept = homes.filter(pl.col("decision") == "keep current")
    assert kept.select(pl.col("bill_savings_usd_annual").is_null().all()).item()
    assert set(homes["baseline"]) == {"current behaviour"}


def test_a_larger_comfort_limit_lets_the_policy_whose_comfort_rises_be_sent():
    """comfort_rise_limit_degree_hours is the largest allowed upper end of the comfort change interval."""
    homes = _decided(CASES, Config(comfort_rise_limit_degree_hours=0.5)).homes
    e = homes.filter(pl.col("premise_id") == "E").row(0, named=True)
    assert (e["decision"], e["policy"]) == ("send", "deep")


def test_learned_policies_count_only_where_the_safety_test_proposed_them():
    """A learned policy's premise rows count only if the safety test proposed it (in that mode)."""
    rows = [
        _row("A", "shallow", bill_lower_bound_usd=0.1),
        _row("A", "learned-cohort-north", bill_lower_bound_usd=0.9),
        _row("D", "shallow", bill_lower_bound_usd=0.1),
        _row("D", "learned-cohort-south", bill_lower_bound_usd=0.9),
    ]
    safety = pl.DataFrame(
        {
            "policy_name": ["learned-cohort-north", "learned-cohort-south", "learned-cohort-north"],
            "mode": ["cool", "cool", "heat"],
            "scope": ["cohort", "cohort", "cohort"],
            "key": ["north", "south", "north"],
            "outcome": ["proposed", "no safe improvement found", "no safe improvement found"],
        }
    )
    homes = _decided(rows, safety=safety).homes
    chosen = dict(homes.filter(pl.col("decision") == "send").select("premise_id", "policy").rows())
    assert chosen == {"A": "learned-cohort-north", "D": "shallow"}
    assert homes.filter(pl.col("premise_id") == "D")["policies_considered"].item() == 1


def test_totals_add_the_homes_that_get_each_policy_with_intervals_in_quadrature():
    """Program and cohort sums are the homes' sums; half-widths add as sqrt(sum of squares), each home's
    half-width being z standard errors of independent estimates (normal approximation)."""
    rows = [
        _row("A", "deep"),
        _row("B", "deep", bill_savings_usd_annual=10.0, bill_ci_low_annual=7.0, bill_ci_high_annual=14.0),
        _row("D", "deep", bill_savings_usd_annual=-5.0, bill_ci_low_annual=-9.0, bill_ci_high_annual=-4.0),
        _row("E", "deep", bill_lower_bound_usd=-1.0),
    ]
    totals = _decided(rows).totals
    program = totals.filter((pl.col("scope") == "program") & (pl.col("decision") == "send")).row(
        0, named=True
    )
    assert program["homes"] == 3
    assert program["bill_savings_usd_annual"] == pytest.approx(35.0)
    assert program["bill_ci_low_annual"] == pytest.approx(35.0 - math.sqrt(18**2 + 3**2 + 4**2))
    assert program["bill_ci_high_annual"] == pytest.approx(35.0 + math.sqrt(18**2 + 4**2 + 1**2))
    assert program["savings_kwh_annual"] == pytest.approx(360.0)
    assert program["savings_kwh_ci_low_annual"] == pytest.approx(360.0 - math.sqrt(3 * 60**2))
    north = totals.filter((pl.col("key") == "north") & (pl.col("decision") == "send")).row(0, named=True)
    assert north["homes"] == 2 and north["bill_savings_usd_annual"] == pytest.approx(40.0)
    kept = totals.filter(pl.col("scope") == "program").filter(pl.col("decision") == "keep current")
    assert dict(kept.select("reason", "homes").rows()) == {"bound not above zero": 1, "no usable episodes": 3}
    assert kept.select(pl.col("bill_savings_usd_annual").is_null().all()).item()


# ---------------------------------------------------------------- on the sample lake


@pytest.fixture(scope="module")
def ledger(sample_lake_run):
    path = sample_lake_run.config.ledger_path
    return {name: ledger_frame(path, name) for name in ("recommendation", "recommendation_total", "savings")}


def test_sample_lake_recommendation_grain(ledger):
    """One row per enrolled premise and mode (key premise_id, mode); decisions and reasons in their sets;
    a policy exactly on send rows; annual figures only where a policy is sent; all 60 homes present."""
    homes = ledger["recommendation"]
    assert homes["premise_id"].null_count() == 0
    assert not homes.select("premise_id", "mode").is_duplicated().any()
    assert homes["premise_id"].n_unique() == 60
    assert set(homes["decision"]) <= {rec.SEND, rec.KEEP}
    assert set(homes["reason"]) <= set(rec.REASONS)
    assert set(homes["mode"].drop_nulls()) <= {"cool", "heat"}
    send = pl.col("decision") == rec.SEND
    assert homes.select((send == pl.col("policy").is_not_null()).all()).item()
    assert homes.filter(~send).select(pl.col("bill_savings_usd_annual").is_null().all()).item()
    # The nine homes without presence sensing are counted with their reason, not dropped.
    unseen = homes.filter(pl.col("reason") == rec.REASON_NO_EPISODES)
    assert unseen.height == 9 and unseen["reason_detail"].null_count() == 0
    # Every evaluated home's decision rests on the recommended estimator's premise rows.
    evaluated = ledger["savings"].filter((pl.col("scope") == "premise") & pl.col("recommended"))
    assert set(homes.filter(pl.col("mode").is_not_null())["premise_id"]) == set(evaluated["key"])


def test_sample_lake_program_totals_equal_the_sum_of_the_homes_that_get_each_policy(ledger):
    """Per cohort and for the program, homes and annual USD and kWh equal the sums over the homes rows."""
    homes, totals = ledger["recommendation"], ledger["recommendation_total"]
    keys = ["mode", "decision", "policy", "reason"]
    for scope, group in (("program", pl.lit("program")), ("cohort", pl.col("cohort"))):
        expected = (
            homes.with_columns(group.alias("key"))
            .group_by("key", *keys)
            .agg(pl.len().alias("homes"), pl.col("bill_savings_usd_annual", "savings_kwh_annual").sum())
        )
        found = totals.filter(pl.col("scope") == scope)
        joined = expected.join(found, on=["key", *keys], how="full", nulls_equal=True, suffix="_total")
        assert joined.height == found.height == expected.height
        assert (joined["homes"] == joined["homes_total"]).all()
        sent = joined.filter(pl.col("decision") == rec.SEND)
        for column in ("bill_savings_usd_annual", "savings_kwh_annual"):
            assert sent[column].to_list() == pytest.approx(sent[f"{column}_total"].to_list())
    assert totals.filter(pl.col("scope") == "program")["homes"].sum() == 60


def test_sample_lake_totals_with_a_looser_comfort_limit_add_up_the_homes_sent(sample_lake_run, ledger):
    """With comfort allowed to rise (limit 10 °C·h per episode), some sample-lake home is sent a policy, and
    the program's annual USD and kWh per policy are exactly the sums over those homes' rows."""
    from pipeline import store

    config = sample_lake_run.config
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        premises = store.query(con, "premise_coverage")
    decided = rec.recommend(ledger["savings"], premises, Config(comfort_rise_limit_degree_hours=10.0))
    sent = decided.homes.filter(pl.col("decision") == rec.SEND)
    assert sent.height >= 1
    by_policy = sent.group_by("policy").agg(
        pl.len().alias("homes"), pl.col("bill_savings_usd_annual", "savings_kwh_annual").sum()
    )
    program = decided.totals.filter((pl.col("scope") == "program") & (pl.col("decision") == rec.SEND))
    joined = by_policy.join(program, on="policy", suffix="_total")
    assert joined.height == by_policy.height == program.height
    assert (joined["homes"] == joined["homes_total"]).all()
    for column in ("bill_savings_usd_annual", "savings_kwh_annual"):
        assert joined[column].to_list() == pytest.approx(joined[f"{column}_total"].to_list())
    assert (program["bill_ci_low_annual"] <= program["bill_savings_usd_annual"]).all()
