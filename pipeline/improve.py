"""Learned setpoint policies and the safety test that decides whether one is proposed (the improve stage).

Per mode, the used episodes are split by time: those starting before the cut (the
earliest ``1 - improve_holdout_share`` of them) are the learning part, the later ones
the held-out part, which no choice below looks at except the safety test itself.

For each scope with enough evidence (the portfolio, each habit type, cohort and
premise; ``improve_scopes``, ``improve_min_episodes``):

1. **Learn** Q on the scope's learning episodes, by off-policy Monte Carlo control
   with weighted importance sampling (``control.mc_control``, Sutton and Barto 2018,
   5.7) or fitted Q iteration (``control.fitted_q_iteration``, Ernst, Geurts and
   Wehenkel 2005). ``improve_learner = 'auto'`` picks by held-out evidence *within
   the learning part*: both learn on its earliest two thirds and the one whose safety
   bound (the test below) is higher on its last third wins, ties to MC control.
2. **Stay where the data can speak** (Pi_b-SPIBB, Laroche, Trichelair and Tachet des
   Combes 2019, ``control.baseline_bootstrapped``): at each premise, pairs the scope
   logged fewer than ``improve_min_count`` times keep *that home's own* behaviour
   probability; the rest of the state's mass goes to the best allowed well-sampled
   action. Allowed means inside the safety band and, at the last decision (in force
   when the residents return), within the premise's comfort limits
   (``control.allowed_mask``). Keeping each home's own probabilities makes the
   importance ratio exactly one wherever nothing moved, so the test's weights vary
   only where the policy does. ``improve_epsilon`` softens the moving mass; 0 is
   enough for support here, since the behaviour model gives every action a
   probability of at least ``behavior_floor``.
3. **Safety test** on the scope's held-out episodes (Thomas, Theocharous and
   Ghavamzadeh 2015), see ``improvement_bound``: the policy is ``proposed`` when the
   one-sided lower bound at ``confidence`` on its improvement over the residents'
   behaviour, USD per episode, is above zero and its comfort penalty is not
   estimated worse; else "no safe improvement found" with the reason.

The improvement is bounded through paired, per-episode differences with a control
variate. With rho_i the episode's importance ratio and G_i its return,
v_pi - v_b = E_b[(rho - 1) G], and because E_b[rho | xi] = 1 for anything xi that no
action can change (the episode's prices and weather), also
v_pi - v_b = E_b[(rho - 1) (G - g(xi))] for any function g fixed in advance. Here g
is a per-premise regression of the return on the window's price-hours and
price-degree-hours, fitted on the learning part only; G - g spreads over about a
dollar where G spreads over ten, and the bound's slack scales with that spread.
"""

from __future__ import annotations

from dataclasses import dataclass
from statistics import NormalDist

import numpy as np
import polars as pl

from pipeline import control
from pipeline import evaluate as evaluation
from pipeline.behavior import BehaviorModel
from pipeline.config import Config
from pipeline.estimators.safety import PRE_SHARE, split_bound

LEARNERS: tuple[str, ...] = ("mc_control", "fitted_q_iteration")
"""The learners ``improve_learner`` may name besides 'auto'."""
SAFETY_BOUNDS: tuple[str, ...] = ("student_t", "exact")
"""How the safety test bounds the improvement (see ``improvement_bound``)."""
SCOPES: tuple[str, ...] = ("portfolio", "habit_type", "cohort", "premise")
"""Scopes a policy can be learned for, broadest first."""
PROPOSED, NOT_FOUND = "proposed", "no safe improvement found"

SAFETY_COLUMNS = [
    "policy_name",
    "mode",
    "scope",
    "key",
    "outcome",
    "reason",
    "learner",
    "bound_method",
    "confidence",
    "n_premises",
    "n_learning_episodes",
    "n_held_out_episodes",
    "n_bound_episodes",
    "held_out_from_utc",
    "savings_estimate_usd",
    "lower_bound_usd",
    "comfort_change_usd",
    "residual_low_usd",
    "residual_high_usd",
    "outside_range_episodes",
    "min_count",
    "epsilon",
    "min_probability",
]
"""Columns of the ``safety_test`` ledger table, one row per mode and scope key."""
SAFETY_FLOATS = [
    "confidence",
    "savings_estimate_usd",
    "lower_bound_usd",
    "comfort_change_usd",
    "residual_low_usd",
    "residual_high_usd",
    "epsilon",
]
SAFETY_TEXT = ["outcome", "reason", "learner", "bound_method"]


@dataclass(frozen=True)
class Improvement:
    """Ledger frames of the improve stage."""

    policy: pl.DataFrame
    savings: pl.DataFrame
    safety_test: pl.DataFrame


# ---------------------------------------------------------------- pieces, each testable alone


def behavior_vectors(steps: pl.DataFrame, behavior: BehaviorModel, actions: tuple[int, ...]) -> np.ndarray:
    """The behaviour model's probability of every action at each step's premise and state, (n_steps, A)."""
    probs = np.stack(
        [behavior.probabilities(steps.with_columns(pl.lit(a).alias("_a")), "_a") for a in actions], axis=1
    )
    return probs / probs.sum(axis=1, keepdims=True)


def premise_policy(
    q_rows: np.ndarray,
    visits_rows: np.ndarray,
    behavior_rows: np.ndarray,
    allowed_rows: np.ndarray,
    min_count: int,
    epsilon: float,
    min_probability: float = 0.0,
) -> np.ndarray:
    """Pi_b-SPIBB of a scope's Q at rows of (premise, state): each row keeps its home's own behaviour.

    Every argument is (n_rows, A): the scope's Q and visit counts at the row's state, the
    home's behaviour probabilities and the home's allowed actions there. The behaviour is
    first kept to the allowed actions (``control.restrict``), so a home whose residents
    would leave a setback in force at the return is made to restore comfort.

    Besides the scope's rarely logged pairs, an action the home's own behaviour takes with
    probability below ``min_probability`` is bootstrapped too (it keeps that probability
    and receives none of the moved mass): the scope's other homes may take it, but this
    home's logs cannot speak for it, and an importance ratio over an action its residents
    (nearly) never take has no support to rest on. It also caps each moved step's ratio at
    1 / ``min_probability``.
    """
    base = control.restrict(behavior_rows, allowed_rows)
    q = np.where(base >= min_probability, q_rows, np.nan) if min_probability > 0 else q_rows
    return control.baseline_bootstrapped(
        q, visits_rows, base, min_count, allowed=allowed_rows, epsilon=epsilon
    )


def premise_tables(
    policy_rows: pl.DataFrame,
    premises: pl.DataFrame,
    mode: str,
    behavior: BehaviorModel,
    config: Config,
    min_count: int,
    epsilon: float,
    min_probability: float = 0.0,
) -> np.ndarray:
    """Each premise's full table (n_premises, S, A) of a learned scope policy, from its ledger rows.

    ``policy_rows`` are one policy's ``policy`` rows (q_value, visits per state and action);
    ``premises`` (premise_id, cohort, comfort_cool_c, comfort_heat_c) in the order wanted.
    The same rule as the stage's (``premise_policy``) over every state, so what the stage
    evaluated is what a thermostat of that home would run.
    """
    space, actions = config.state, config.actions
    n_states, n_actions = space.n_states, len(actions)
    rows = policy_rows.sort("state_key", "action")
    q = rows["q_value"].to_numpy().reshape(n_states, n_actions)
    visits = rows["visits"].to_numpy().reshape(n_states, n_actions)
    grid = premises.select("premise_id", "cohort").join(
        pl.DataFrame({"state_key": np.arange(n_states, dtype=np.int64)}), how="cross"
    )
    bvec = behavior_vectors(grid.with_columns(pl.lit(mode).alias("mode")), behavior, actions)
    mask = control.allowed_mask(
        space,
        actions,
        heating=mode == "heat",
        comfort_cool_c=premises["comfort_cool_c"].to_numpy(),
        comfort_heat_c=premises["comfort_heat_c"].to_numpy(),
        cool_band_c=config.cool_band_c,
        heat_band_c=config.heat_band_c,
    ).reshape(-1, n_actions)
    n = premises.height
    table = premise_policy(
        np.tile(q, (n, 1)), np.tile(visits, (n, 1)), bvec, mask, min_count, epsilon, min_probability
    )
    return table.reshape(n, n_states, n_actions)


def control_variate(
    premise: np.ndarray,
    features: np.ndarray,
    returns: np.ndarray,
    learning: np.ndarray,
    prior_episodes: float = 5.0,
) -> np.ndarray:
    """Per-premise least squares of the return on exogenous features, fitted on the learning part only.

    ``premise`` (n,) integer codes, ``features`` (n, k), ``returns`` (n,), ``learning`` (n,)
    bool. Each premise's coefficients are pulled toward the pooled ones by
    ``prior_episodes`` pseudo-episodes (ridge toward the pooled fit), so a home with few
    learning episodes leans on the pooled line, and one with fewer learning episodes than
    features takes it. Returns the prediction for every episode.
    """
    x, y = features[learning], returns[learning]
    n_premises = int(premise.max()) + 1 if premise.size else 0
    pooled = np.linalg.lstsq(x, y, rcond=None)[0] if x.shape[0] else np.zeros(features.shape[1])
    k = features.shape[1]
    p = premise[learning]
    xx = np.zeros((n_premises, k, k))
    xy = np.zeros((n_premises, k))
    for i in range(k):  # k is two: loops over features, not rows
        xy[:, i] = np.bincount(p, x[:, i] * y, n_premises)
        for j in range(k):
            xx[:, i, j] = np.bincount(p, x[:, i] * x[:, j], n_premises)
    scale = prior_episodes * (x.T @ x) / max(x.shape[0], 1)
    # Premises with fewer learning episodes than features take the pooled line (no system to solve).
    few = np.bincount(p, minlength=n_premises) < k
    xx[few], xy[few] = np.eye(k), pooled
    lhs = xx + np.where(few[:, None, None], 0.0, scale[None])
    rhs = xy + np.where(few[:, None], 0.0, (scale @ pooled)[None])
    coef = np.linalg.solve(lhs, rhs[..., None])[..., 0]
    return np.einsum("nk,nk->n", features, coef[premise])


def _t_quantile(level: float, dof: np.ndarray) -> np.ndarray:
    """Student's t quantile by the Cornish-Fisher expansion (Abramowitz and Stegun 1964, 26.7.5)."""
    z = NormalDist().inv_cdf(level)
    v = np.maximum(np.asarray(dof, dtype=float), 1.0)
    return z + (z**3 + z) / (4 * v) + (5 * z**5 + 16 * z**3 + 3 * z) / (96 * v**2)


def improvement_bound(
    rho: np.ndarray,
    residual: np.ndarray,
    rank: np.ndarray,
    *,
    level: float,
    method: str,
    residual_range: tuple[float, float],
    paired: np.ndarray | None = None,
    pre_share: float = PRE_SHARE,
) -> dict[str, float]:
    """One-sided lower bound on v_pi - v_b (USD per episode) from held-out episodes of one scope.

    ``rho`` (n,) importance ratios, ``residual`` (n,) G - g(xi) with g fixed before these
    episodes were seen, ``rank`` (n,) each episode's place in time. The earliest
    ``pre_share`` of the episodes (D_pre) only choose the truncation level; the bound
    is computed on the rest (D_post), for both methods, so they use the same episodes.

    * ``exact``: Theorem 1 of Thomas, Theocharous and Ghavamzadeh (AAAI 2015) on
      X = 1 + (rho - 1) z, z = (residual - low) / (high - low) in [0, 1] for the stated
      ``residual_range`` (low, high), E[X] = 1 + (v_pi - v_b) / (high - low); valid for
      any distribution as long as every residual lies in the range (an episode outside it
      voids the bound: NaN, counted in ``outside``).
    * ``student_t``: the approximate bound of Thomas, Theocharous and Ghavamzadeh (ICML
      2015, "High confidence policy improvement", their Student's t form) on per-episode
      unbiased improvement terms Y (``paired``; default (rho - 1) residual):
      mean(Y) - t_{level, n-1} sd(Y) / sqrt(n). It assumes the mean of Y is close to
      normal, which heavy-tailed weights can break. The stage passes the doubly robust
      terms of ``doubly_robust_terms``.

    Returns bound, estimate (mean of the method's terms on D_post), n_bound, outside.
    """
    rho, residual, rank = (np.asarray(a) for a in (rho, residual, rank))
    n = rho.size
    n_pre = int(np.ceil(pre_share * n))
    post = rank >= n_pre
    y = (rho - 1.0) * residual if (paired is None or method == "exact") else np.asarray(paired, dtype=float)
    estimate = float(y[post].mean()) if post.any() else float("nan")
    low, high = residual_range
    outside = int(((residual < low) | (residual > high)).sum())
    if n_pre < 2 or n - n_pre < 2:
        return {"bound": float("nan"), "estimate": estimate, "n_bound": n - n_pre, "outside": outside}
    if method == "student_t":
        yp = y[post]
        bound = float(yp.mean() - _t_quantile(level, yp.size - 1) * yp.std(ddof=1) / np.sqrt(yp.size))
    elif method == "exact":
        if outside:
            bound = float("nan")
        else:
            z = np.clip((residual - low) / (high - low), 0.0, 1.0)
            x = 1.0 + (rho - 1.0) * z
            out = split_bound(x, rank, np.zeros(n, dtype=np.int64), 1, level=level, pre_share=pre_share)
            bound = float((high - low) * (out["bound"][0] - 1.0))
    else:
        raise ValueError(f"unknown safety bound {method!r}; one of {SAFETY_BOUNDS}")
    return {"bound": bound, "estimate": estimate, "n_bound": n - n_pre, "outside": outside}


def doubly_robust_terms(
    code: np.ndarray,
    n_episodes: int,
    reward: np.ndarray,
    ratio: np.ndarray,
    q_logged: np.ndarray,
    v_state: np.ndarray,
) -> np.ndarray:
    """Per-episode doubly robust estimate of v_pi minus the episode's own return, (n_episodes,).

    Jiang and Li (2016), the step-wise form: with w_t = prod_{k <= t} pi(a_k|s_k) /
    b(a_k|s_k) (w_{-1} = 1) and a model Q fixed in advance (V(s) = sum_a pi(a|s) Q(s, a)),

        DR_i = sum_t [ w_t r_t - (w_t Q(s_t, a_t) - w_{t-1} V(s_t)) ],

    unbiased for v_pi whatever Q is when b is the logging policy; DR_i - G_i is then an
    unbiased term of v_pi - v_b per episode, whose spread shrinks as Q nears the truth.
    ``code`` (n_steps,) are episode codes 0 .. n_episodes - 1, sorted, steps in time order;
    ``ratio`` pi/b of each logged action (0 where pi forbids it).
    """
    code = np.asarray(code)
    ratio = np.asarray(ratio, dtype=float)
    zero = ratio <= 0.0
    log_r = np.log(np.where(zero, 1.0, ratio))
    first = np.r_[True, code[1:] != code[:-1]]
    starts = np.flatnonzero(first)
    cs = np.cumsum(log_r)
    log_w = np.minimum(cs - (cs - log_r)[starts][np.cumsum(first) - 1], 700.0)
    zeros = np.cumsum(zero)
    dead = zeros - (zeros - zero)[starts][np.cumsum(first) - 1] > 0
    w = np.where(dead, 0.0, np.exp(log_w))
    w_prev = np.r_[1.0, w[:-1]]
    w_prev[first] = 1.0
    term = w * reward - w * q_logged + w_prev * v_state
    return np.bincount(code, term, n_episodes) - np.bincount(code, reward, n_episodes)


def _episode_rank(start: np.ndarray) -> np.ndarray:
    """Each episode's place in time (ties in the given order), 0 = earliest."""
    order = np.argsort(start, kind="stable")
    rank = np.empty(start.size, dtype=np.int64)
    rank[order] = np.arange(start.size)
    return rank


def _learn(learner: str, ep, st, ac, rw, b, n_states: int, n_actions: int) -> control.LearnedQ:
    if learner == "mc_control":
        return control.mc_control(ep, st, ac, rw, b, n_states, n_actions)
    return control.fitted_q_iteration(ep, st, ac, rw, n_states, n_actions)


# ---------------------------------------------------------------- the stage's work, one mode at a time


@dataclass(frozen=True)
class _Mode:
    """One mode's steps as flat arrays, with per-episode arrays beside them."""

    steps: pl.DataFrame
    ep: np.ndarray
    st: np.ndarray
    ac: np.ndarray
    rw: np.ndarray
    bvec: np.ndarray
    b: np.ndarray
    allowed: np.ndarray
    """(n_steps, A) actions each step's premise allows in its state."""
    code: np.ndarray
    """Episode code of each step, 0 .. n_episodes - 1."""
    held: np.ndarray
    """Per episode: in the held-out part."""
    rank: np.ndarray
    """Per episode: place in time."""
    returns: np.ndarray
    residual: np.ndarray
    penalty: np.ndarray
    """Per episode: comfort penalty, USD."""
    cut: object
    to_go: np.ndarray
    """Per step: the logged return from the step to the episode's end, less the exogenous prediction."""
    rw_cv: np.ndarray
    """Per step: the reward, less the episode's exogenous prediction at its last step."""


def _prepare_mode(
    steps: pl.DataFrame,
    behavior: BehaviorModel,
    exogenous: pl.DataFrame,
    premises: pl.DataFrame,
    config: Config,
    mode: str,
) -> _Mode:
    space, actions = config.state, config.actions
    ep, st, ac, rw = control.step_arrays(steps, actions)
    bvec = behavior_vectors(steps, behavior, actions)
    b = bvec[np.arange(ac.size), ac]
    first = np.r_[True, ep[1:] != ep[:-1]]
    code = np.cumsum(first) - 1
    episodes = steps.filter(pl.Series(first)).select(
        "episode_id", "premise_id", pl.col("step_start_utc").alias("start")
    )
    n_ep = episodes.height
    returns = np.bincount(code, rw, n_ep)
    penalty = np.bincount(code, steps["comfort_penalty_usd"].fill_null(0.0).to_numpy(), n_ep)
    start = episodes["start"].to_numpy()
    rank = _episode_rank(start)
    n_learn = int(round((1.0 - config.improve_holdout_share) * n_ep))
    # Held out: every episode starting at or after the start of the (n_learn + 1)-th, ties included.
    cut = episodes["start"].sort()[min(n_learn, n_ep - 1)]
    held = (episodes["start"] >= cut).to_numpy()
    feats = episodes.join(exogenous, on="episode_id", how="left", maintain_order="left")
    x = np.c_[
        feats["price_hours"].fill_null(0.0).to_numpy(), feats["price_degree_hours"].fill_null(0.0).to_numpy()
    ]
    premise_code = np.unique(episodes["premise_id"].to_numpy(), return_inverse=True)[1].reshape(-1)
    fitted = control_variate(premise_code, x, returns, ~held)
    # Rewards with the exogenous prediction taken off each episode's last step: what the learners
    # and the test's model see (the same action values up to terms no action moves).
    last = np.r_[first[1:], True]
    rw_cv = rw - np.where(last, fitted[code], 0.0)
    before = np.cumsum(rw_cv) - rw_cv
    to_go = (returns - fitted)[code] - (before - before[np.flatnonzero(first)][code])
    # Allowed actions per premise, then per step.
    own = premises.filter(pl.col("premise_id").is_in(steps["premise_id"].unique().implode())).sort(
        "premise_id"
    )
    mask = control.allowed_mask(
        space,
        actions,
        heating=mode == "heat",
        comfort_cool_c=own["comfort_cool_c"].to_numpy(),
        comfort_heat_c=own["comfort_heat_c"].to_numpy(),
        cool_band_c=config.cool_band_c,
        heat_band_c=config.heat_band_c,
    )
    pidx = (
        steps.select("premise_id")
        .join(
            own.select("premise_id").with_row_index("_p"), on="premise_id", how="left", maintain_order="left"
        )["_p"]
        .to_numpy()
    )
    return _Mode(
        steps,
        ep,
        st,
        ac,
        rw,
        bvec,
        b,
        mask[pidx, st],
        code,
        held,
        rank,
        returns,
        returns - fitted,
        penalty,
        cut,
        to_go,
        rw_cv,
    )


def _rho(m: _Mode, pi: np.ndarray, rows: np.ndarray, n_ep: int) -> np.ndarray:
    """Per episode importance ratio over the steps ``rows`` (all steps of the episodes concerned)."""
    with np.errstate(divide="ignore"):  # a logged action the policy forbids: ratio 0
        log_ratio = np.log(pi[rows]) - np.log(m.b[rows])
    return np.exp(np.bincount(m.code[rows], log_ratio, n_ep))


def _scope_keys(m: _Mode, membership: pl.DataFrame, mode: str) -> dict[str, np.ndarray]:
    """Per step, the key of each scope (as text)."""
    top_type = (
        membership.filter(pl.col("mode") == mode)
        .sort("share", descending=True)
        .unique("premise_id", keep="first")
        .select("premise_id", pl.col("habit_type").cast(pl.Utf8).alias("_type"))
        if membership.height and "mode" in membership.columns
        else pl.DataFrame(schema={"premise_id": pl.Utf8, "_type": pl.Utf8})
    )
    typed = m.steps.select("premise_id").join(top_type, on="premise_id", how="left", maintain_order="left")
    return {
        "portfolio": np.full(m.st.size, "portfolio", dtype=object),
        "habit_type": typed["_type"].to_numpy().astype(object),
        "cohort": m.steps["cohort"].cast(pl.Utf8).to_numpy().astype(object),
        "premise": m.steps["premise_id"].to_numpy().astype(object),
    }


def _policy_name(scope: str, key: str) -> str:
    return "learned-portfolio" if scope == "portfolio" else f"learned-{scope}-{key}"


def _choose_learner(m: _Mode, rows: np.ndarray, config: Config) -> str:
    """'auto': each learner on the learning rows' earliest two thirds, scored by the bound on the rest."""
    if config.improve_learner != "auto":
        return config.improve_learner
    episodes = np.unique(m.code[rows])
    order = episodes[np.argsort(m.rank[episodes], kind="stable")]
    inner = order[: (2 * order.size) // 3]
    train = np.isin(m.code[rows], inner)
    fit_rows, check_rows = rows[train], rows[~train]
    if check_rows.size == 0 or fit_rows.size == 0:
        return LEARNERS[0]
    check_eps = np.unique(m.code[check_rows])
    scores = {}
    for learner in LEARNERS:
        learned = _learn(
            learner,
            m.ep[fit_rows],
            m.st[fit_rows],
            m.ac[fit_rows],
            m.rw_cv[fit_rows],
            m.b[fit_rows],
            config.state.n_states,
            len(config.actions),
        )
        _, rho, terms = _test_terms(m, learned, check_rows, fit_rows, config)
        result = improvement_bound(
            rho[check_eps],
            m.residual[check_eps],
            _episode_rank(m.rank[check_eps]),
            level=config.confidence,
            method="student_t",
            residual_range=(-np.inf, np.inf),
            paired=terms[check_eps],
        )
        scores[learner] = result["bound"] if np.isfinite(result["bound"]) else -np.inf
    return max(LEARNERS, key=lambda name: (scores[name], name == LEARNERS[0]))


def _test_terms(
    m: _Mode, learned: control.LearnedQ, rows: np.ndarray, fit_rows: np.ndarray, config: Config
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The policy's probability of each logged action (all steps; 1 outside ``rows``), and per episode
    its importance ratio and doubly robust improvement term.

    The doubly robust model is the learner's own Q from ``fit_rows``; pairs it has no value
    for take the state's mean logged return-to-go there, else the mean over ``fit_rows``.
    """
    n_states = learned.q.shape[0]
    to_go = m.to_go[fit_rows]
    count = np.bincount(m.st[fit_rows], minlength=n_states)
    state_mean = np.where(
        count > 0, np.bincount(m.st[fit_rows], to_go, n_states) / np.maximum(count, 1), to_go.mean()
    )
    q_hat = np.where(np.isfinite(learned.q), learned.q, state_mean[:, None])
    table = _pi_rows(m, learned, rows, config)
    pi = np.ones(m.st.size)
    pi[rows] = table[np.arange(rows.size), m.ac[rows]]
    n_ep = m.returns.size
    rho = _rho(m, pi, rows, n_ep)
    q_rows = q_hat[m.st[rows]]
    terms = doubly_robust_terms(
        m.code[rows],
        n_ep,
        m.rw_cv[rows],
        pi[rows] / m.b[rows],
        q_rows[np.arange(rows.size), m.ac[rows]],
        (table * q_rows).sum(axis=1),
    )
    return pi, rho, terms


def _pi_rows(m: _Mode, learned: control.LearnedQ, rows: np.ndarray, config: Config) -> np.ndarray:
    """The learned policy's probabilities at ``rows`` (n_rows, A), each home keeping its own habit."""
    return premise_policy(
        learned.q[m.st[rows]],
        learned.visits[m.st[rows]],
        m.bvec[rows],
        m.allowed[rows],
        config.improve_min_count,
        config.improve_epsilon,
        config.improve_min_probability,
    )


def _scope_table(m: _Mode, learned: control.LearnedQ, rows: np.ndarray, config: Config) -> pl.DataFrame:
    """The scope's policy as ledger rows: the scope's mean behaviour where bootstrapped, else the move."""
    n_states, n_actions = learned.q.shape
    st = m.st[rows]
    count = np.bincount(st, minlength=n_states).astype(float)
    base = np.stack([np.bincount(st, m.bvec[rows, j], n_states) for j in range(n_actions)], axis=1)
    base = np.where(count[:, None] > 0, base / np.maximum(count, 1.0)[:, None], 1.0 / n_actions)
    allowed_sum = np.zeros((n_states, n_actions))
    np.add.at(allowed_sum, st, m.allowed[rows])
    # A state's allowed actions: those every logged home there allows (where none, any allowed).
    everywhere = allowed_sum >= count[:, None]
    anywhere = allowed_sum > 0
    allowed = np.where(everywhere.any(axis=1, keepdims=True), everywhere, anywhere)
    allowed = np.where(allowed.any(axis=1, keepdims=True), allowed, True)
    table = premise_policy(
        learned.q,
        learned.visits,
        base,
        allowed,
        config.improve_min_count,
        config.improve_epsilon,
        config.improve_min_probability,
    )
    bootstrapped = (learned.visits < config.improve_min_count) | ~np.isfinite(learned.q)
    return pl.DataFrame(
        {
            "state_key": np.repeat(np.arange(n_states, dtype=np.int64), n_actions),
            "action": np.tile(np.asarray(config.actions, dtype=np.int64), n_states),
            "probability": table.reshape(-1),
            "q_value": learned.q.reshape(-1),
            "visits": learned.visits.reshape(-1).astype(np.int64),
            "bootstrapped": bootstrapped.reshape(-1),
        }
    )


def _keep_rows(savings: pl.DataFrame, scope: str, key: str) -> pl.DataFrame:
    """The savings rows that describe a policy of ``scope``/``key``: its own row and its premises'."""
    if scope == "portfolio":
        return savings
    own = savings.filter(pl.col("scope") == "portfolio").with_columns(
        pl.lit(scope).alias("scope"), pl.lit(key).alias("key")
    )
    if scope == "cohort":
        own = savings.filter((pl.col("scope") == "cohort") & (pl.col("key") == key))
    premises = savings.filter(pl.col("scope") == "premise")
    return own if scope == "premise" else pl.concat([own, premises], how="vertical_relaxed")


def improve_mode(
    steps: pl.DataFrame,
    behavior: BehaviorModel,
    exogenous: pl.DataFrame,
    premises: pl.DataFrame,
    days: pl.DataFrame,
    config: Config,
    mode: str,
) -> Improvement:
    """Learn, test and describe the policies of one mode's steps (sorted by episode_id, t)."""
    m = _prepare_mode(steps, behavior, exogenous, premises, config, mode)
    keys = _scope_keys(m, behavior.membership(), mode)
    n_states, n_actions = config.state.n_states, len(config.actions)
    held_step = m.held[m.code]
    # Residual range for the exact bound, stated from the learning part: half as wide again each side.
    learn_res = m.residual[~m.held]
    low = 1.5 * float(learn_res.min()) if learn_res.size else -np.inf
    high = 1.5 * float(learn_res.max()) if learn_res.size else np.inf
    policies, savings, tests = [], [], []
    premise_code = np.unique(m.steps["premise_id"].to_numpy(), return_inverse=True)[1].reshape(-1)
    for scope in config.improve_scopes:
        # Each key's rows at once: sort the steps by key (no pass over all steps per key).
        labels = pl.Series(keys[scope], dtype=pl.Utf8)
        known = labels.is_not_null().to_numpy()
        values, inverse = np.unique(labels.fill_null("").to_numpy().astype(str), return_inverse=True)
        inverse = np.where(known, inverse.reshape(-1), -1)
        order = np.argsort(inverse, kind="stable")
        bounds = np.searchsorted(inverse[order], np.arange(values.size + 1))
        for index in np.flatnonzero(np.diff(bounds) > 0):
            key = str(values[index])
            rows = np.sort(order[bounds[index] : bounds[index + 1]])
            eps = np.unique(m.code[rows])
            held_eps, learn_eps = eps[m.held[eps]], eps[~m.held[eps]]
            name = _policy_name(scope, key)
            row = {
                "policy_name": name,
                "mode": mode,
                "scope": scope,
                "key": key,
                "learner": None,
                "bound_method": config.safety_bound,
                "confidence": config.confidence,
                "n_premises": int(np.unique(premise_code[rows]).size),
                "n_learning_episodes": int(learn_eps.size),
                "n_held_out_episodes": int(held_eps.size),
                "n_bound_episodes": None,
                "held_out_from_utc": m.cut,
                "savings_estimate_usd": None,
                "lower_bound_usd": None,
                "comfort_change_usd": None,
                "residual_low_usd": low,
                "residual_high_usd": high,
                "outside_range_episodes": None,
                "min_count": config.improve_min_count,
                "epsilon": config.improve_epsilon,
                "min_probability": config.improve_min_probability,
            }
            if min(held_eps.size, learn_eps.size) < config.improve_min_episodes:
                tests.append(
                    row
                    | {
                        "outcome": NOT_FOUND,
                        "reason": f"too little evidence: {learn_eps.size} learning and"
                        f" {held_eps.size} held-out"
                        f" episodes, fewer than improve_min_episodes ({config.improve_min_episodes})",
                    }
                )
                continue
            learn_rows = rows[~held_step[rows]]
            learner = _choose_learner(m, learn_rows, config)
            learned = _learn(
                learner,
                m.ep[learn_rows],
                m.st[learn_rows],
                m.ac[learn_rows],
                m.rw_cv[learn_rows],
                m.b[learn_rows],
                n_states,
                n_actions,
            )
            pi, rho, terms = _test_terms(m, learned, rows, learn_rows, config)
            held_rows = rows[held_step[rows]]
            result = improvement_bound(
                rho[held_eps],
                m.residual[held_eps],
                _episode_rank(m.rank[held_eps]),
                level=config.confidence,
                method=config.safety_bound,
                residual_range=(low, high),
                paired=terms[held_eps],
            )
            comfort = float(np.mean((rho[held_eps] - 1.0) * m.penalty[held_eps]))
            bound = result["bound"]
            if not np.isfinite(bound):
                reason = (
                    f"bound void: {result['outside']} held-out episode(s) outside the stated residual range"
                    if result["outside"]
                    else "too little evidence for the bound"
                )
            elif bound <= 0:
                reason = f"bound below zero: {bound:.3f} USD/episode at {config.confidence:.0%}"
            elif comfort > 0:
                reason = f"comfort worse: penalty estimated up {comfort:.3f} USD/episode"
            else:
                reason = None
            proposed = reason is None
            tests.append(
                row
                | {
                    "outcome": PROPOSED if proposed else NOT_FOUND,
                    "reason": reason or f"bound {bound:.3f} USD/episode > 0 at {config.confidence:.0%}",
                    "learner": learner,
                    "n_bound_episodes": result["n_bound"],
                    "savings_estimate_usd": result["estimate"],
                    "lower_bound_usd": bound if np.isfinite(bound) else None,
                    "comfort_change_usd": comfort,
                    "outside_range_episodes": result["outside"],
                }
            )
            policies.append(
                _scope_table(m, learned, learn_rows, config).with_columns(
                    pl.lit(name).alias("policy_name"),
                    pl.lit(mode).alias("mode"),
                    pl.lit(scope).alias("scope"),
                    pl.lit(key).alias("key"),
                    pl.lit(learner).alias("learner"),
                    pl.lit(proposed).alias("proposed"),
                )
            )
            held_frame = m.steps[held_rows]
            s, _ = evaluation.evaluate_policy(
                held_frame,
                pi[held_rows],
                m.b[held_rows],
                days,
                config,
            )
            savings.append(
                _keep_rows(s, scope, key).with_columns(
                    pl.lit(name).alias("policy_name"), pl.lit(mode).alias("mode")
                )
            )
    return Improvement(
        policy=pl.concat(policies) if policies else _empty_policy(),
        savings=pl.concat(savings, how="vertical_relaxed") if savings else _empty_savings(),
        safety_test=pl.DataFrame(tests, infer_schema_length=None)
        .select(SAFETY_COLUMNS)
        .with_columns(
            # Columns no scope filled (nothing had enough evidence) keep their types.
            pl.col(SAFETY_FLOATS).cast(pl.Float64),
            pl.col(SAFETY_TEXT).cast(pl.Utf8),
        ),
    )


def _empty_savings() -> pl.DataFrame:
    """No learned policy's savings rows (nothing had enough evidence): the key columns, no rows."""
    return pl.DataFrame(schema=dict.fromkeys(("policy_name", "mode", "scope", "key", "estimator"), pl.Utf8))


def _empty_policy() -> pl.DataFrame:
    return pl.DataFrame(
        schema={
            "state_key": pl.Int64,
            "action": pl.Int64,
            "probability": pl.Float64,
            "q_value": pl.Float64,
            "visits": pl.Int64,
            "bootstrapped": pl.Boolean,
            "policy_name": pl.Utf8,
            "mode": pl.Utf8,
            "scope": pl.Utf8,
            "key": pl.Utf8,
            "learner": pl.Utf8,
            "proposed": pl.Boolean,
        }
    )


POLICY_COLUMNS = [
    "policy_name",
    "mode",
    "scope",
    "key",
    "state_key",
    "action",
    "probability",
    "q_value",
    "visits",
    "bootstrapped",
    "learner",
    "proposed",
]


def improve(
    steps: pl.DataFrame,
    behavior: BehaviorModel,
    exogenous: pl.DataFrame,
    premises: pl.DataFrame,
    days: pl.DataFrame,
    config: Config,
) -> Improvement:
    """Every mode's learned policies, their held-out savings rows and safety-test outcomes."""
    parts = [
        improve_mode(steps.filter(pl.col("mode") == mode), behavior, exogenous, premises, days, config, mode)
        for mode in sorted(steps["mode"].unique())
    ]
    savings = [p.savings for p in parts if p.savings.height]
    savings_frame = (
        pl.concat(savings, how="vertical_relaxed")
        .select(*evaluation.COLUMNS)
        .with_columns(
            pl.lit(config.comfort_penalty_usd_per_degree_hour).alias("comfort_penalty_usd_per_degree_hour"),
            pl.col("mode")
            .replace_strict(evaluation.BILL_NOTES, default=None, return_dtype=pl.String)
            .alias("bill_note"),
        )
        .sort("policy_name", "mode", "scope", "key", "estimator")
        if savings
        else _empty_savings()
    )
    return Improvement(
        policy=pl.concat([p.policy for p in parts])
        .select(POLICY_COLUMNS)
        .with_columns(pl.col("visits").cast(pl.Int64)),
        savings=savings_frame,
        safety_test=pl.concat([p.safety_test for p in parts], how="vertical_relaxed").sort(
            "mode", "scope", "key"
        ),
    )
