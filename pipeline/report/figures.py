"""The report's figures, drawn with matplotlib's object API (no pyplot state, safe in worker threads).

Each function takes ledger frames and returns a ``Chart``: the matplotlib figure and the frame
of exactly the values it plotted (tests compare both with the ledger). Labels carry units; text
from data is drawn as plain text (math parsing off), so a premise id can never be read as markup.
"""

from __future__ import annotations

import io
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

import matplotlib
import numpy as np
import polars as pl
from matplotlib.figure import Figure

INK = "#22303a"
GRID = "#d9d4c7"
PAPER = "#fbfaf6"
PALETTE = ("#2a7f8f", "#d08c2e", "#8a5a9e", "#b5533c", "#5c8a3a", "#4a6fa5", "#a3786b", "#6b7a86")
"""Policy colours, in the order policies are first listed (ours: teal, amber, plum, brick, ...)."""

_STYLE = {
    "text.parse_math": False,
    "font.family": "DejaVu Sans",
    "font.size": 10,
    "axes.edgecolor": INK,
    "axes.labelcolor": INK,
    "axes.titlesize": 11,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.facecolor": PAPER,
    "axes.grid": True,
    "grid.color": GRID,
    "grid.linewidth": 0.7,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "xtick.color": INK,
    "ytick.color": INK,
    "figure.facecolor": "white",
    "svg.fonttype": "path",
}
_ACTION_CMAP = matplotlib.colormaps["PuOr_r"].with_extremes(bad="#cfcabd")
"""Setback (amber) to pre-cooling (purple); grey where the table has no row for the state."""
WIDTH_IN = 8.6
DPI = 110


@dataclass
class Chart:
    """One figure of the report: its file stem, caption, the matplotlib figure and the plotted values."""

    name: str
    caption: str
    figure: Figure
    plotted: pl.DataFrame
    _png: bytes | None = field(default=None, repr=False)

    def png(self) -> bytes:
        """The figure as PNG bytes, drawn once: the same bytes go inline into the HTML and into the file."""
        if self._png is None:
            buffer = io.BytesIO()
            with style():
                self.figure.savefig(
                    buffer, format="png", dpi=DPI, bbox_inches="tight", metadata={"Software": None}
                )
            self._png = buffer.getvalue()
        return self._png


def _legend(ax, **options) -> None:
    """A legend when the axes hold labelled series (a figure of empty data has none)."""
    if ax.get_legend_handles_labels()[0]:
        ax.legend(**options)


@contextmanager
def style() -> Iterator[None]:
    """The report's own look: plain, light grid, left titles, no math parsing of data text."""
    with matplotlib.rc_context(_STYLE):
        yield


def _figure(height: float, ncols: int = 1) -> tuple[Figure, np.ndarray]:
    figure = Figure(figsize=(WIDTH_IN, height), layout="constrained")
    axes = figure.subplots(1, ncols, squeeze=False)[0]
    return figure, axes


def colours(names: list[str]) -> dict[str, str]:
    """A colour per policy name, stable for the order given."""
    return {name: PALETTE[i % len(PALETTE)] for i, name in enumerate(names)}


def savings_by_policy(rows: pl.DataFrame, level: float, with_comfort: bool = False) -> Chart:
    """Program savings per policy: estimate with its interval (band) and lower bound (tick); beside it,
    when the rows carry it, the comfort change (°C-hours of setback in force after the return)."""
    rows = rows.sort("policy_name", "mode")
    labels = [f"{p} ({m})" for p, m in zip(rows["policy_name"], rows["mode"], strict=True)]
    palette = colours(rows["policy_name"].unique(maintain_order=True).to_list())
    dots = [palette[p] for p in rows["policy_name"]]
    with style():
        figure = Figure(figsize=(WIDTH_IN, 0.55 * max(len(labels), 2) + 1.5), layout="constrained")
        ratios = (2.2, 1.0) if with_comfort else (1.0,)
        axes = figure.subplots(1, len(ratios), squeeze=False, width_ratios=ratios, sharey=True)[0]
        ax = axes[0]
        y = np.arange(len(labels))
        est = rows["savings_usd_per_episode"].to_numpy().astype(float)
        low = rows["ci_low"].to_numpy().astype(float)
        high = rows["ci_high"].to_numpy().astype(float)
        bound = rows["lower_bound_usd"].to_numpy().astype(float)
        for i, policy in enumerate(rows["policy_name"]):
            ax.plot([low[i], high[i]], [y[i], y[i]], color=palette[policy], linewidth=5, alpha=0.35)
        ax.scatter(est, y, color=dots, zorder=3, label="estimate", s=40)
        ax.scatter(bound, y, marker="|", color=INK, s=200, zorder=3, label="lower bound")
        ax.axvline(0.0, color=INK, linewidth=0.8)
        ax.set_yticks(y, labels)
        ax.invert_yaxis()
        ax.set_xlabel("savings against current behaviour, USD per away episode")
        ax.set_title(f"Savings ({level:.0%} interval as band, lower bound as tick)")
        _legend(ax, loc="upper center", bbox_to_anchor=(0.5, -0.22), ncol=2, frameon=False)
        plotted = rows.select(
            "policy_name", "mode", "savings_usd_per_episode", "ci_low", "ci_high", "lower_bound_usd"
        )
        if with_comfort:
            side = axes[1]
            change = rows["comfort_change_degree_hours"].to_numpy().astype(float)
            c_low = rows["comfort_change_ci_low"].to_numpy().astype(float)
            c_high = rows["comfort_change_ci_high"].to_numpy().astype(float)
            for i, policy in enumerate(rows["policy_name"]):
                side.plot([c_low[i], c_high[i]], [y[i], y[i]], color=palette[policy], linewidth=5, alpha=0.35)
            side.scatter(change, y, color=dots, zorder=3, s=40)
            side.axvline(0.0, color=INK, linewidth=0.8)
            side.set_xlabel("comfort change, °C-hours per episode")
            side.set_title("Comfort change (+ = less comfort)")
            plotted = plotted.with_columns(
                rows.select("comfort_change_degree_hours", "comfort_change_ci_low", "comfort_change_ci_high")
            )
    return Chart("program-savings", "Program savings and comfort per policy", figure, plotted)


def premise_distribution(rows: pl.DataFrame) -> Chart:
    """Per-home savings (supported rows of the recommended estimator): a row of dots per policy, the
    median as a tick; readable for any number of policies."""
    rows = rows.filter((pl.col("status") == "ok") & pl.col("savings_usd_per_episode").is_not_null()).sort(
        "policy_name", "key"
    )
    policies = rows["policy_name"].unique(maintain_order=True).to_list()
    palette = colours(policies)
    # Spread the dots of a row over its height by a fixed pattern (no random draw), so they do not overlap.
    spread = (np.arange(rows.height) % 7 - 3) * 0.07
    with style():
        figure, (ax,) = _figure(0.5 * max(len(policies), 2) + 1.3)
        place = {p: i for i, p in enumerate(policies)}
        y = np.array([place[p] for p in rows["policy_name"]], dtype=float) + spread
        x = rows["savings_usd_per_episode"].to_numpy().astype(float)
        ax.scatter(x, y, c=[palette[p] for p in rows["policy_name"]], s=16, alpha=0.75)
        for policy, i in place.items():
            median = float(np.median(x[rows["policy_name"].to_numpy() == policy]))
            ax.plot([median, median], [i - 0.35, i + 0.35], color=INK, linewidth=2)
        ax.axvline(0.0, color=INK, linewidth=0.8)
        ax.set_yticks(np.arange(len(policies)), policies)
        ax.invert_yaxis()
        ax.set_xlabel("savings of one home, USD per away episode (tick: median over homes)")
        ax.set_title("Per-home savings, homes with a supported estimate")
    plotted = rows.select("key", "policy_name", "savings_usd_per_episode")
    return Chart("home-savings", "Per-home savings, supported homes", figure, plotted)


def recommendation_counts(counts: pl.DataFrame) -> Chart:
    """Homes per recommended policy ('keep current' included), horizontal bars."""
    counts = counts.sort("homes", descending=True)
    with style():
        figure, (ax,) = _figure(0.45 * max(counts.height, 2) + 1.2)
        y = np.arange(counts.height)
        ax.barh(y, counts["homes"].to_numpy(), color=PALETTE[0])
        ax.set_yticks(y, counts["label"].to_list())
        ax.invert_yaxis()
        ax.set_xlabel("homes")
        ax.set_title("What each home is sent")
    return Chart("recommendations", "Homes per recommendation", figure, counts)


def estimates_by_episodes(rows: pl.DataFrame) -> Chart:
    """Program savings as episodes accumulate: a panel per policy, a line and band per estimator."""
    rows = rows.sort("policy_name", "mode", "estimator", "n_episodes")
    panels = rows.select("policy_name", "mode").unique(maintain_order=True).rows()
    estimators = rows["estimator"].unique(maintain_order=True).sort().to_list()
    palette = colours(estimators)
    with style():
        figure, axes = _figure(3.0, max(len(panels), 1))
        for ax, (policy, mode) in zip(axes, panels, strict=False):
            for name in estimators:
                part = rows.filter(
                    (pl.col("policy_name") == policy)
                    & (pl.col("mode") == mode)
                    & (pl.col("estimator") == name)
                )
                xs = part["n_episodes"].to_numpy().astype(float)
                low = part["ci_low"].to_numpy().astype(float)
                high = part["ci_high"].to_numpy().astype(float)
                ax.fill_between(xs, low, high, color=palette[name], alpha=0.18, linewidth=0)
                ax.plot(
                    xs,
                    part["savings_usd_per_episode"].to_numpy().astype(float),
                    color=palette[name],
                    label=name,
                )
            ax.axhline(0.0, color=INK, linewidth=0.8)
            ax.set_title(f"{policy} ({mode})")
            ax.set_xlabel("episodes used, oldest first")
        axes[0].set_ylabel("savings, USD per episode")
        _legend(axes[0], frameon=False, fontsize=8)
    plotted = rows.select(
        "policy_name", "mode", "estimator", "n_episodes", "savings_usd_per_episode", "ci_low", "ci_high"
    )
    return Chart(
        "estimates-by-episodes",
        "Estimates as episodes accumulate (band: normal approximation)",
        figure,
        plotted,
    )


def weight_diagnostics(rows: pl.DataFrame) -> Chart:
    """Per premise and policy: effective sample size against the largest single weight's share."""
    rows = rows.filter(pl.col("ess").is_not_null() & pl.col("max_weight_share").is_not_null()).sort(
        "policy_name", "key"
    )
    policies = rows["policy_name"].unique(maintain_order=True).to_list()
    palette = colours(policies)
    with style():
        figure, (ax,) = _figure(3.4)
        for policy in policies:
            part = rows.filter(pl.col("policy_name") == policy)
            ax.scatter(
                part["ess"].to_numpy(),
                part["max_weight_share"].to_numpy(),
                color=palette[policy],
                label=policy,
                s=18,
                alpha=0.8,
            )
        ax.set_xlabel("effective sample size (Kish), episodes")
        ax.set_ylabel("largest weight's share of all weight")
        ax.set_ylim(0, 1.02)
        ax.set_title("Importance-weight diagnostics per home (right and low is healthy)")
        _legend(ax, frameon=False, fontsize=8)
    plotted = rows.select("policy_name", "key", "ess", "max_weight_share")
    return Chart("weight-diagnostics", "Importance-weight diagnostics", figure, plotted)


def estimator_agreement(rows: pl.DataFrame) -> Chart:
    """Program and cohort estimates of each policy from every estimator, with intervals."""
    rows = rows.filter(pl.col("savings_usd_per_episode").is_not_null()).sort(
        "policy_name", "mode", "scope", "key", "estimator", descending=[False, False, True, False, False]
    )
    estimators = rows["estimator"].unique(maintain_order=True).sort().to_list()
    palette = colours(estimators)
    cells = rows.select("policy_name", "mode", "scope", "key").unique(maintain_order=True)
    labels = [f"{p} · {k}" for p, k in zip(cells["policy_name"], cells["key"], strict=True)]
    position = {tuple(r): i for i, r in enumerate(cells.rows())}
    spread = np.linspace(-0.25, 0.25, max(len(estimators), 1))
    with style():
        figure, (ax,) = _figure(0.32 * max(len(labels), 3) + 1.4)
        for j, name in enumerate(estimators):
            part = rows.filter(pl.col("estimator") == name)
            y = (
                np.array([position[tuple(r)] for r in part.select(cells.columns).rows()], dtype=float)
                + spread[j]
            )
            est = part["savings_usd_per_episode"].to_numpy().astype(float)
            low = part["ci_low"].to_numpy().astype(float)
            high = part["ci_high"].to_numpy().astype(float)
            ax.errorbar(
                est,
                y,
                xerr=np.vstack([est - low, high - est]),
                fmt="o",
                markersize=4,
                color=palette[name],
                elinewidth=1,
                label=name,
            )
        ax.axvline(0.0, color=INK, linewidth=0.8)
        ax.set_yticks(np.arange(len(labels)), labels)
        ax.invert_yaxis()
        ax.set_xlabel("savings, USD per episode (bars: interval)")
        ax.set_title("Agreement between estimators, program and cohorts (rows with an estimate)")
        _legend(ax, frameon=False, fontsize=8, loc="best")
    plotted = rows.select(
        "policy_name", "mode", "scope", "key", "estimator", "savings_usd_per_episode", "ci_low", "ci_high"
    )
    return Chart("estimator-agreement", "Agreement between estimators", figure, plotted)


def estimate_against_truth(rows: pl.DataFrame, estimate: str, truth: str) -> Chart:
    """Estimated against true savings (simulated lakes), one point per row, the diagonal for reference."""
    rows = rows.filter(pl.col(estimate).is_not_null() & pl.col(truth).is_not_null())
    with style():
        figure, (ax,) = _figure(3.6)
        x = rows[truth].to_numpy().astype(float)
        y = rows[estimate].to_numpy().astype(float)
        ax.scatter(x, y, color=PALETTE[0], s=18)
        if x.size:
            lo, hi = float(min(x.min(), y.min())), float(max(x.max(), y.max()))
            ax.plot([lo, hi], [lo, hi], color=INK, linewidth=0.8)
        ax.set_xlabel("true savings from the simulator, USD per episode")
        ax.set_ylabel("estimated savings, USD per episode")
        ax.set_title("Estimate against truth (simulated lake)")
    return Chart("estimate-vs-truth", "Estimate against truth", figure, rows.select(truth, estimate))


def policy_over_states(
    panels: list[tuple[str, pl.DataFrame]], hours: list[int], bins: list[str], slug: str
) -> Chart:
    """Heat maps of the mean setpoint change each policy makes, by local hour and outdoor heat.

    Each panel's frame has ``hour_bucket``, ``degree_bin`` and ``mean_action`` (°C, positive =
    further setback); cells no row covers stay blank.
    """
    with style():
        figure, axes = _figure(3.0, len(panels))
        image = None
        for ax, (title, frame) in zip(axes, panels, strict=True):
            grid = np.full((len(bins), len(hours)), np.nan)
            if not frame.is_empty():
                grid[frame["degree_bin"].to_numpy(), frame["hour_bucket"].to_numpy()] = frame[
                    "mean_action"
                ].to_numpy()
            image = ax.imshow(grid, origin="lower", aspect="auto", cmap=_ACTION_CMAP, vmin=-2, vmax=2)
            ax.set_xticks(np.arange(len(hours)), [f"{h:02d}" for h in hours])
            ax.set_yticks(np.arange(len(bins)), bins)
            ax.grid(False)
            ax.set_xlabel("local hour (start of bucket), h")
            ax.set_title(title)
        axes[0].set_ylabel("outdoor °C past the balance point")
        figure.colorbar(image, ax=list(axes), label="mean setpoint change, °C (+ = further setback)")
        figure.supxlabel("grey: no row for that state (never logged)", fontsize=8, color=INK)
    plotted = (
        pl.concat(
            [f.with_columns(pl.lit(t).alias("panel")) for t, f in panels if not f.is_empty()],
            how="diagonal_relaxed",
        )
        if any(not f.is_empty() for _, f in panels)
        else pl.DataFrame()
    )
    return Chart(f"home-{slug}-policy", "Policy over states", figure, plotted)


def schedule_lines(rows: pl.DataFrame, slug: str) -> Chart:
    """Hourly setpoints per day type: one line per plan (the proposed policy, the residents' own)."""
    plans = rows["plan"].unique(maintain_order=True).to_list()
    days = rows["day_type"].unique(maintain_order=True).sort().to_list()
    palette = colours(plans)
    with style():
        figure, axes = _figure(2.8, max(len(days), 1))
        for ax, day in zip(axes, days, strict=False):
            for plan in plans:
                part = rows.filter((pl.col("plan") == plan) & (pl.col("day_type") == day)).sort("hour")
                if part.is_empty():
                    continue
                ax.step(
                    part["hour"].to_numpy(),
                    part["setpoint_c"].to_numpy(),
                    where="post",
                    color=palette[plan],
                    label=plan,
                )
            ax.set_xlim(0, 24)
            ax.set_xlabel("local hour, h")
            ax.set_title(day)
        axes[0].set_ylabel("setpoint, °C")
        _legend(axes[0], frameon=False, fontsize=8)
    return Chart(f"home-{slug}-schedule", "Hourly setpoint schedule", figure, rows)


def episode_costs(rows: pl.DataFrame, slug: str) -> Chart:
    """The home's away episodes: cost of each (USD) by start date, used and excluded apart."""
    rows = rows.sort("start_utc")
    with style():
        figure, (ax,) = _figure(2.8)
        used = rows.filter(pl.col("excluded_reason").is_null())
        left = rows.filter(pl.col("excluded_reason").is_not_null())
        ax.scatter(
            used["start_utc"].to_list(), (-used["return_usd"]).to_list(), color=PALETTE[0], s=16, label="used"
        )
        if left.height:
            ax.scatter(
                left["start_utc"].to_list(),
                (-left["return_usd"].fill_null(0.0)).to_list(),
                color=PALETTE[3],
                marker="x",
                s=16,
                label="excluded",
            )
        ax.set_xlabel("episode start (UTC date)")
        ax.set_ylabel("cost incl. comfort penalty, USD")
        ax.set_title("The home's away episodes")
        _legend(ax, frameon=False, fontsize=8)
        figure.autofmt_xdate()
    plotted = rows.select(
        "episode_id", "start_utc", (-pl.col("return_usd")).alias("cost_usd"), "excluded_reason"
    )
    return Chart(f"home-{slug}-episodes", "Episode costs", figure, plotted)
