"""One self-contained HTML report of a scored run folder.

:func:`build_report` reads a run folder written by ``rehedge run`` (the
config, ``manifest.json``, ``metrics.json``, ``heldout.npz`` and the fitted
agents) and writes ``report.html`` beside them: the cautions, the scenario,
the ranked summary table (the numbers of ``metrics.json``, formatted, never
recomputed) and figures as inline base64 PNGs. The file fetches nothing, so
it opens offline in any browser and can be mailed as it is.

Figures: the held-out P&L distribution of every policy; each learned agent's
map (target holding against spot at three times, with the Black-Scholes hedge,
the Whalley-Wilmott band and the agent's own no-trade region); the cumulative
mean cost over time; one held-out path with every policy's holdings; and,
with sibling runs of a sweep, the cost-risk frontier.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import matplotlib
import matplotlib.lines
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from rehedge.errors import ConfigError
from rehedge.training import Run, load_run
from hedge_env.market import GivenPaths
from hedge_env.rollout import rollout

CAUTION = (
    "Decision support, not advice. A policy is only as good as the market model and the data it was "
    "trained on. Check positions, limits and fills against the desk's own risk systems and the rules "
    "that apply where you trade."
)

LEARNED_KINDS = ("linear", "fitted_q", "grid_dp")

# Our own palette: muted, distinguishable in print and for the common colour-vision deficiencies.
PALETTE = ("#1f4e79", "#d1603d", "#3a8f5c", "#8c5fb0", "#e0a526", "#4fa3c7", "#8a5a44", "#7a7a1e",
           "#5c6b73", "#2a9d8f", "#a3a13b", "#34344a")

_STYLE = {
    "figure.facecolor": "white",
    "axes.facecolor": "#f5f3ee",
    "axes.edgecolor": "#a9a397",
    "axes.linewidth": 0.8,
    "axes.grid": True,
    "grid.color": "white",
    "grid.linewidth": 1.0,
    "axes.axisbelow": True,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.titlesize": 9.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.labelsize": 8.5,
    "axes.labelcolor": "#33312c",
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "xtick.color": "#55524b",
    "ytick.color": "#55524b",
    "legend.fontsize": 7.5,
    "legend.frameon": False,
    "lines.linewidth": 1.5,
    "font.family": "DejaVu Sans",
}

_DPI = 100
# A policy whose central P&L range is this many times the median range is left off the P&L and
# frontier plots (typically no_hedge): it would flatten every other policy into one spike.
_OUTLIER_SPREAD = 2.0
# Central quantiles the P&L plot shows.
_CLIP = (0.005, 0.995)
_MAP_SPOTS = 61
# Gaps from the hedge searched for an agent's no-trade region, per share of notional.
_MAP_OFFSET_RANGE = (1e-5, 0.5)
_MAP_OFFSETS_PER_SIDE = 150
_NO_TRADE_TOLERANCE = 1e-9


# ---------------------------------------------------------------------------------------------
# Number formats: one function per kind of number, used for every cell of that kind.
# ---------------------------------------------------------------------------------------------


def format_money(value: float) -> str:
    """Currency amounts, as the command line prints them: whole units from 100, cents from 1,
    three significant digits below 1."""
    if value is None or not math.isfinite(value):
        return "n/a"
    if abs(value) >= 100:
        return f"{value:,.0f}"
    if abs(value) < 1:
        return f"{value:,.3g}"
    return f"{value:,.2f}"


def format_signed_money(value: float) -> str:
    """A difference in currency, always signed."""
    text = format_money(value)
    return text if text.startswith("-") or text == "n/a" else "+" + text


def format_count(value: float) -> str:
    """Turnover, trades per path and volatility points: two decimals."""
    if value is None or not math.isfinite(value):
        return "n/a"
    return f"{value:,.2f}"


# ---------------------------------------------------------------------------------------------
# Reading a run folder
# ---------------------------------------------------------------------------------------------


@dataclass
class _Scored:
    """A run folder with its held-out results."""

    run: Run
    metrics: dict
    heldout: dict[str, np.ndarray]

    @property
    def records(self) -> list[dict]:
        return self.metrics["policies"]


def _read_metrics(run_dir: Path) -> dict:
    path = run_dir / "metrics.json"
    if not path.is_file():
        raise ConfigError(f"{run_dir}: no metrics.json (a run folder is scored by `rehedge run`)")
    return json.loads(path.read_text())


def _load_scored(run_dir: Path, staging: bool = False) -> _Scored:
    run_dir = Path(run_dir)
    run = load_run(run_dir, partial_ok=staging)
    metrics = _read_metrics(run_dir)
    heldout_file = run_dir / "heldout.npz"
    if not heldout_file.is_file():
        raise ConfigError(f"{run_dir}: no heldout.npz (a run folder is scored by `rehedge run`)")
    with np.load(heldout_file) as data:
        heldout = {key: data[key] for key in data.files}
    return _Scored(run, metrics, heldout)


def _colors(names: Sequence[str]) -> dict[str, str]:
    return {name: PALETTE[i % len(PALETTE)] for i, name in enumerate(names)}


# ---------------------------------------------------------------------------------------------
# Figures
# ---------------------------------------------------------------------------------------------


def _figure(width: float, height: float, rows: int = 1, cols: int = 1, **subplot_options):
    figure = Figure(figsize=(width, height), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.subplots(rows, cols, squeeze=False, **subplot_options)
    return figure, axes


def _legend_below(figure: Figure, handles, labels, columns: int = 8) -> None:
    """The figure's legend under its axes, so it never hides a line."""
    figure.legend(handles, labels, loc="outside lower center", ncols=min(columns, len(handles)))


def _png_data_uri(figure: Figure) -> str:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=_DPI, metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _central_range(pnl: np.ndarray) -> tuple[float, float]:
    low, high = np.quantile(pnl, _CLIP)
    return float(low), float(high)


def _wide_policies(pnl: dict[str, np.ndarray]) -> list[str]:
    """Policies whose central P&L range dwarfs the median policy's (left off the shared plots)."""
    spans = {}
    for name, values in pnl.items():
        low, high = _central_range(values)
        spans[name] = high - low
    typical = float(np.median(list(spans.values())))
    if typical <= 0:
        return []
    wide = [name for name, span in spans.items() if span > _OUTLIER_SPREAD * typical]
    return wide if len(wide) < len(pnl) else []


def _pnl_figure(scored: _Scored, colors: dict[str, str]) -> tuple[str, str]:
    names = [r["name"] for r in scored.records]
    pnl = {name: scored.heldout[f"pnl__{name}"] for name in names}
    skipped = _wide_policies(pnl)
    shown = [name for name in names if name not in skipped]
    pooled = np.concatenate([pnl[name] for name in shown])
    low, high = _central_range(pooled)
    bins = np.linspace(low, high, 90)
    figure, axes = _figure(9.0, 3.6)
    ax = axes[0, 0]
    for name in shown:
        values = pnl[name]
        inside = values[(values >= low) & (values <= high)]
        # Density of all paths, so a policy with more paths outside the range sits lower.
        counts, edges = np.histogram(inside, bins=bins)
        density = counts / (values.size * np.diff(edges))
        ax.stairs(density, edges, color=colors[name], linewidth=1.5, label=name)
    ax.axvline(0.0, color="#33312c", linewidth=0.7, linestyle=":")
    ax.set_xlim(low, high)
    ax.set_xlabel("P&L per path over the horizon (currency)")
    ax.set_ylabel("density (per currency unit)")
    ax.set_title("Held-out P&L distribution")
    _legend_below(figure, *ax.get_legend_handles_labels())
    paths = pnl[names[0]].size
    caption = (f"Step histograms of the P&L of {paths:,} held-out paths per policy, between the "
               f"{100 * _CLIP[0]:g}% and {100 * _CLIP[1]:g}% quantiles of the policies shown (pooled).")
    if skipped:
        caption += (f" Not shown: {', '.join(skipped)} (its P&L spread is over {_OUTLIER_SPREAD:g} times the "
                    "median policy's and would flatten the others; its numbers are in the table).")
    return _png_data_uri(figure), caption


def _ww_band(scored: _Scored):
    """The tuned Whalley-Wilmott baseline of the run, else any Whalley-Wilmott baseline, else None."""
    run = scored.run
    candidates = [spec.name for spec in run.config.baselines if spec.kind == "whalley_wilmott"]
    tuned = [name for name in candidates if name in run.manifest.get("tuned", {})]
    chosen = (tuned or candidates or [None])[0]
    return None if chosen is None else (chosen, run.baselines[chosen])


def _map_times(steps: int) -> list[int]:
    """Early, middle and last decision times. Early is the second decision, not the first: at the
    first every path has the starting spot and no holding, so an agent has seen no other state there."""
    return sorted({min(1, steps - 1), steps // 2, steps - 1})


def _observations(problem, spot: np.ndarray, k: int, holding_per_notional: np.ndarray, factors: Sequence[float]):
    rows = np.empty((spot.size, 3 + len(factors)))
    rows[:, 0] = spot / problem.reference_spot
    rows[:, 1] = problem.years_to_horizon(k)
    rows[:, 2] = holding_per_notional
    for j, value in enumerate(factors, start=3):
        rows[:, j] = value
    return rows


def _holding_offsets() -> np.ndarray:
    """Holdings around the hedge, per share of notional: geometric on each side, so the edge of a
    narrow region and of a wide one are both found to within about 8% of its width."""
    side = np.geomspace(_MAP_OFFSET_RANGE[0], _MAP_OFFSET_RANGE[1], _MAP_OFFSETS_PER_SIDE)
    return np.concatenate([-side[::-1], [0.0], side])


def policy_map(problem, agent, spot: np.ndarray, k: int, factors: Sequence[float] = ()) -> dict[str, np.ndarray]:
    """An agent's decisions at decision time ``k`` over a spot grid, per share of notional.

    Returns ``hedge`` (minus the book's Black-Scholes delta), ``target`` (the
    agent's target when holding the hedge) and ``no_trade_low`` /
    ``no_trade_high``: the smallest and largest holding near the hedge (see
    :func:`_holding_offsets`) that the agent keeps (``act == holding`` within
    1e-9); NaN where it keeps none.
    """
    notional = problem.notional_shares
    t_days = problem.schedule.time_days(k)
    # A mark volatility the market supplies is the first observed factor (HedgingProblem).
    volatility = float(factors[0]) if problem.mark_volatility_observed and len(factors) else None
    hedge = -problem.book.value_and_delta(spot, t_days, problem.marks, volatility)[1] / notional
    target = np.asarray(agent.act(_observations(problem, spot, k, hedge, factors)), dtype=float)
    offsets = _holding_offsets()
    holdings = hedge[:, None] + offsets[None, :]
    rows = _observations(problem, np.repeat(spot, offsets.size), k, holdings.ravel(), factors)
    kept = np.abs(np.asarray(agent.act(rows), dtype=float) - holdings.ravel()) <= _NO_TRADE_TOLERANCE
    kept = kept.reshape(holdings.shape)
    low = np.where(kept.any(axis=1), np.where(kept, holdings, np.inf).min(axis=1), np.nan)
    high = np.where(kept.any(axis=1), np.where(kept, holdings, -np.inf).max(axis=1), np.nan)
    return {"hedge": hedge, "target": target, "no_trade_low": low, "no_trade_high": high}


def _map_figures(scored: _Scored, sample_factors: dict[str, np.ndarray]) -> list[tuple[str, str, str]]:
    run, problem = scored.run, scored.run.problem
    learned = [spec.name for spec in run.config.agents if spec.kind in LEARNED_KINDS]
    if not learned:
        return []
    notional = problem.notional_shares
    volatility = problem.marks.volatility
    path_volatility = getattr(run.market, "volatility", volatility)
    band = _ww_band(scored)
    times = _map_times(problem.schedule.steps)
    out = []
    for name in learned:
        agent = run.agents[name]
        figure, axes = _figure(10.5, 5.6, 2, len(times), sharex="col", sharey="row")
        for column, k in enumerate(times):
            # Spots where the paths are at this time (+-2.5 sd of log spot): off them an agent extrapolates.
            spread = 2.5 * path_volatility * math.sqrt(problem.schedule.time_days(k) / problem.marks.days_per_year)
            spot = problem.reference_spot * np.exp(np.linspace(-spread, spread, _MAP_SPOTS))
            factors = [float(sample_factors[f][0, k]) for f in run.market.observed_factors]
            decisions = policy_map(problem, agent, spot, k, factors)
            t_days = problem.schedule.time_days(k)
            hedge = decisions["hedge"]
            mark_volatility = factors[0] if problem.mark_volatility_observed and factors else None
            half_width = (None if band is None
                          else band[1].half_width_shares(spot, t_days, mark_volatility) / notional)
            # Top: holdings themselves; bottom: their gap from the hedge, where the bands are readable.
            for ax, center in ((axes[0, column], hedge), (axes[1, column], 0.0 * hedge)):
                shift = hedge - center
                ax.fill_between(spot, decisions["no_trade_low"] - shift, decisions["no_trade_high"] - shift,
                                color=PALETTE[5], alpha=0.3, linewidth=0, label=f"{name} no-trade region")
                if half_width is not None:
                    for sign in (-1.0, 1.0):
                        ax.plot(spot, center + sign * half_width, color=PALETTE[1], linewidth=1.0, linestyle="--",
                                label=f"{band[0]} band" if sign > 0 else None)
                ax.plot(spot, center, color="#33312c", linewidth=1.0, linestyle=":", label="Black-Scholes hedge")
                ax.plot(spot, decisions["target"] - shift, color=PALETTE[0], linewidth=1.8, label=f"{name} target")
            days_left = problem.schedule.horizon_days - t_days
            axes[0, column].set_title(f"day {t_days:g}, {_days(days_left)} to horizon")
            axes[1, column].set_xlabel("spot (currency per share)")
        axes[0, 0].set_ylabel("holding (shares per share of notional)")
        axes[1, 0].set_ylabel("holding - hedge (per share of notional)")
        _legend_below(figure, *axes[0, 0].get_legend_handles_labels())
        low, high = _MAP_OFFSET_RANGE
        at = (f"{100 * volatility:g}% volatility" if not problem.mark_volatility_observed
              else "the mark volatility of the first held-out path at each time")
        caption = (f"{name}: target holding against spot when the current holding is the Black-Scholes "
                   f"hedge (minus the book's delta at {at}, per share of the "
                   f"{notional:,.0f}-share notional), over the spots within 2.5 standard deviations of "
                   "log spot at each time (about 99% of paths); below, the same as gaps from the hedge. The shaded "
                   f"region is where {name} does not trade: the holdings it keeps (target equal to the "
                   f"holding within {_NO_TRADE_TOLERANCE:g}), searched from {low:g} to {high:g} either side "
                   "of the hedge, geometrically spaced.")
        if band is not None:
            caption += (f" Dashed: the {band[0]} no-trade band (risk aversion "
                        f"{band[1].risk_aversion:.6g}"
                        f"{', tuned on the training paths' if band[0] in run.manifest.get('tuned', {}) else ''}).")
        out.append((name, _png_data_uri(figure), caption))
    return out


def _cost_figure(scored: _Scored, colors: dict[str, str]) -> tuple[str, str]:
    schedule = scored.run.problem.schedule
    names = [r["name"] for r in scored.records]
    days = schedule.step_days * np.arange(0, schedule.steps + 1)
    figure, axes = _figure(9.0, 3.4)
    ax = axes[0, 0]
    for name in names:
        cumulative = np.concatenate([[0.0], np.cumsum(scored.heldout[f"step_cost__{name}"])])
        ax.plot(days, cumulative, color=colors[name], label=name, marker="o", markersize=2.5)
    ax.set_xlabel("time (days from start)")
    ax.set_ylabel("cumulative mean cost per path (currency)")
    ax.set_title("Trading and impact cost over the horizon")
    ax.set_xlim(0, schedule.horizon_days)
    _legend_below(figure, *ax.get_legend_handles_labels())
    caption = ("Mean over held-out paths of the proportional, fixed and impact costs paid up to the end of "
               "each rehedge interval (the trade at its start included); the last point includes the unwind "
               "at the horizon.")
    return _png_data_uri(figure), caption


def _sample_path(scored: _Scored):
    run, problem = scored.run, scored.run.problem
    steps = problem.schedule.steps
    seed = scored.metrics.get("heldout_seed", run.config.data.heldout_seed)
    paths = (run.heldout_market or run.market).generate(1, steps, problem.dt_years, seed)
    return paths, seed


def _path_figure(scored: _Scored, paths, seed: int, colors: dict[str, str]) -> tuple[str, str]:
    run, problem = scored.run, scored.run.problem
    schedule = problem.schedule
    policies = {**run.baselines, **run.agents}
    names = [r["name"] for r in scored.records if r["name"] in policies]
    days = schedule.step_days * np.arange(0, schedule.steps + 1)
    figure, axes = _figure(9.0, 3.6)
    ax = axes[0, 0]
    # The market's observed factors (e.g. a variance) go with the path into the observations.
    source = GivenPaths(paths, observed_factors=run.market.observed_factors)
    for name in names:
        held = rollout(problem, policies[name], source, 1, keep_holdings=True, name=name).holdings[0]
        # Holding over each rehedge interval; repeated at the horizon so the last interval shows.
        ax.plot(days, np.append(held, held[-1]), color=colors[name], drawstyle="steps-post", label=name)
    ax.set_xlabel("time (days from start)")
    ax.set_ylabel("holding (shares)")
    ax.set_xlim(0, schedule.horizon_days)
    ax.set_title("One held-out path: holdings of every policy")
    spot_axis = ax.twinx()
    spot_axis.spines["right"].set_visible(True)
    spot_axis.grid(False)
    spot_axis.plot(days, paths.spot[0], color="#33312c", linewidth=1.0, linestyle="--", label="spot (right axis)")
    spot_axis.set_ylabel("spot (currency per share)")
    lines, labels = ax.get_legend_handles_labels()
    more, more_labels = spot_axis.get_legend_handles_labels()
    _legend_below(figure, lines + more, labels + more_labels)
    caption = (f"The first path of the held-out stream (seed {seed}): the holding each policy keeps over "
               "each rehedge interval (before the unwind at the horizon), and the spot (dashed, right axis).")
    return _png_data_uri(figure), caption


def _flatten(value, prefix: str = "") -> dict[str, object]:
    if isinstance(value, dict):
        out = {}
        for key, item in value.items():
            out.update(_flatten(item, f"{prefix}{key}."))
        return out
    return {prefix[:-1]: value}


def _order_variants(variants: list[tuple[Path, dict, dict]],
                    swept: Sequence[str] = ()) -> tuple[list[tuple[Path, dict, dict]], list[str]]:
    """Runs in the order of the settings that differ between them (the ``swept`` dotted keys when
    given), each with a short label such as ``cost_rate=0.001`` (the run's config name when
    nothing but the name differs)."""
    flats = [_flatten({k: v for k, v in config.items() if k not in ("name", "description", "sweep")})
             for _, _, config in variants]
    keys = list(swept) or sorted({k for flat in flats for k in flat})
    differing = [k for k in keys if len({json.dumps(flat.get(k), sort_keys=True) for flat in flats}) > 1][:3]

    def sort_key(index: int):
        values = [flats[index].get(k) for k in differing]
        return [(0, v, "") if isinstance(v, (int, float)) else (1, 0, json.dumps(v)) for v in values]

    order = sorted(range(len(variants)), key=sort_key)
    labels = [", ".join(f"{k.rsplit('.', 1)[-1]}={json.dumps(flats[i].get(k))}" for k in differing)
              or variants[i][2].get("name", variants[i][0].name) for i in order]
    return [variants[i] for i in order], labels


_MARKERS = "osD^v<>ph*"


def _frontier_figure(scored: _Scored, siblings: list[tuple[Path, dict, dict]],
                     colors: dict[str, str]) -> tuple[str, str]:
    figure, caption = _frontier_plot(scored, siblings, colors)
    return _png_data_uri(figure), caption


def write_frontier(run_dirs: Sequence[Path], target: Path, swept: Sequence[str] = ()) -> Path:
    """The cost-risk frontier across scored run folders (the cells of a sweep, labelled by the
    ``swept`` dotted keys) as a PNG file."""
    scored = _load_scored(Path(run_dirs[0]))
    others = [_read_sibling(path) for path in run_dirs[1:]]
    config_order = [spec.name for spec in [*scored.run.config.baselines, *scored.run.config.agents]]
    colors = _colors([*config_order, *(r["name"] for r in scored.records if r["name"] not in config_order)])
    with matplotlib.rc_context(_STYLE):
        figure, _ = _frontier_plot(scored, others, colors, swept)
        figure.savefig(target, format="png", dpi=_DPI, metadata={"Software": None})
    return Path(target)


def _frontier_plot(scored: _Scored, siblings: list[tuple[Path, dict, dict]], colors: dict[str, str],
                   swept: Sequence[str] = ()):
    here = (scored.run.path, scored.metrics, scored.run.config.model_dump(mode="json"))
    variants, labels = _order_variants([here, *siblings], swept)
    names = [r["name"] for r in scored.records]
    skipped = _wide_policies({name: scored.heldout[f"pnl__{name}"] for name in names})
    tail_key = "cvar_95" if "cvar_95" in scored.records[0] else next(
        (k for k in scored.records[0] if k.startswith("cvar_")), "std_pnl")
    risk_keys = (("std_pnl", "std of P&L per path (currency)"),
                 (tail_key, f"CVaR {tail_key[5:]} of the loss (currency)"))
    # Many runs (a sweep's cells) have long labels: fewer legend columns, a taller figure for its rows.
    columns = 8 if len(variants) <= 4 else 3
    legend_rows = -(-(len(names) + len(variants)) // columns)
    figure, axes = _figure(10.5, 3.8 + (0.22 * legend_rows if columns < 8 else 0.0), 1, 2, sharey=True)
    for ax, (key, label) in zip(axes[0], risk_keys):
        for name in names:
            if name in skipped:
                continue
            points = []
            for index, (_, metrics, _) in enumerate(variants):
                record = next((r for r in metrics["policies"] if r["name"] == name), None)
                if record is not None and key in record:
                    points.append((record[key], record["mean_cost"] + record["mean_impact"], index))
            if not points:
                continue
            x, y, _ = zip(*points)
            ax.plot(x, y, color=colors[name], linewidth=1.2, label=name)
            for xi, yi, index in points:
                ax.plot(xi, yi, linestyle="none", marker=_MARKERS[index % len(_MARKERS)], markersize=5,
                        color=colors[name])
        ax.set_xlabel(label)
        ax.set_title(f"Cost against {'std of P&L' if key == 'std_pnl' else label.split(' of')[0]}")
    axes[0, 0].set_ylabel("mean trading + impact cost per path (currency)")
    handles, legend_labels = axes[0, 0].get_legend_handles_labels()
    for index, label in enumerate(labels):
        handles.append(matplotlib.lines.Line2D([], [], linestyle="none", marker=_MARKERS[index % len(_MARKERS)],
                                               markersize=5, color="#5c6b73"))
        legend_labels.append(label)
    _legend_below(figure, handles, legend_labels, columns)
    caption = ("Cost-risk frontier: mean trading + impact cost per path against the spread of P&L, one "
               "marker per run of the sweep ("
               + "; ".join(f"{label}: {path.name}" for (path, _, _), label in zip(variants, labels))
               + "), the points of a policy joined in that order. Numbers from each run's metrics.json.")
    if skipped:
        caption += (f" Not shown: {', '.join(skipped)} (its P&L spread is over {_OUTLIER_SPREAD:g} times the "
                    "median policy's).")
    return figure, caption


# ---------------------------------------------------------------------------------------------
# HTML
# ---------------------------------------------------------------------------------------------

_CSS = """
body { font-family: -apple-system, "Segoe UI", Helvetica, Arial, sans-serif; color: #2b2a27;
       max-width: 1120px; margin: 0 auto; padding: 18px 26px 40px; line-height: 1.45; font-size: 14px; }
h1 { font-size: 22px; margin: 4px 0 2px; color: #1f4e79; }
h2 { font-size: 17px; margin: 28px 0 8px; border-bottom: 2px solid #e6e1d6; padding-bottom: 3px; color: #1f4e79; }
h3 { font-size: 14px; margin: 16px 0 6px; }
.caution { background: #fbf3e4; border-left: 5px solid #d1603d; padding: 10px 14px; margin: 12px 0 18px; }
.muted { color: #6b675e; }
table { border-collapse: collapse; margin: 6px 0 10px; font-size: 12.5px; }
th, td { padding: 4px 8px; border-bottom: 1px solid #e6e1d6; vertical-align: top; }
th { background: #f5f3ee; text-align: left; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.summary th { text-align: right; }
table.summary th:first-child, table.summary th:nth-child(2) { text-align: left; }
table.facts th { width: 210px; }
.scroll { overflow-x: auto; }
figure { margin: 14px 0 22px; }
figure img { max-width: 100%; height: auto; display: block; }
figcaption { font-size: 12.5px; color: #55524b; margin-top: 4px; max-width: 980px; }
.above { color: #2f7a4d; } .below { color: #b3412c; }
"""


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _facts_table(rows: list[tuple[str, str]]) -> str:
    body = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in rows)
    return f'<table class="facts">{body}</table>'


def _days(value: float) -> str:
    return f"{value:g} day" if value == 1 else f"{value:g} days"


def _percent(value: float) -> str:
    return f"{100 * value:g}%"


def _scenario_html(scored: _Scored) -> str:
    run, metrics, manifest = scored.run, scored.metrics, scored.run.manifest
    config = run.config
    market, frictions, objective, schedule = config.market, config.frictions, config.objective, config.schedule
    records = scored.records
    paths = int(records[0]["paths"]) if records and "paths" in records[0] else config.data.heldout_paths
    legs = "".join(
        f"<tr><td>{_e(o.kind)}</td><td class='num'>{_e(f'{o.strike:g}')}</td>"
        f"<td class='num'>{_e(f'{o.expiry_days:g}')}</td><td class='num'>{_e(f'{o.quantity:+g}')}</td>"
        f"<td class='num'>{_e(f'{o.multiplier:g}')}</td><td class='num'>{_e(f'{o.quantity * o.multiplier:+,g}')}</td>"
        f"<td>{'sold' if o.quantity < 0 else 'bought'}</td></tr>"
        for o in config.book.options
    )
    book = ("<table><thead><tr><th>kind</th><th>strike (currency)</th><th>expiry (days)</th>"
            "<th>quantity (contracts)</th><th>multiplier (shares per contract)</th><th>shares</th><th>side</th>"
            f"</tr></thead><tbody>{legs}</tbody></table>")
    limit = frictions.position_limit_shares
    facts = [
        ("config", config.name),
        ("description", config.description or "(none)"),
        ("market", market.describe()),
        ("pricing", _pricing_text(config, run.problem)),
        ("schedule", f"{schedule.steps} rehedges every {_days(schedule.step_days)} "
                     f"(horizon {_days(config.horizon_days)}), settlement: {schedule.settlement}"),
        ("frictions", f"proportional cost {frictions.cost_rate * 1e4:g} bps of traded notional; fixed cost "
                      f"{frictions.fixed_cost:g} per trade; temporary impact coefficient "
                      f"{frictions.impact_coefficient:g}, exponent {frictions.impact_exponent:g}; permanent "
                      f"impact {frictions.permanent_impact:g}; ADV {frictions.adv_shares:,.0f} shares; borrow fee "
                      f"{_percent(frictions.borrow_fee)} a year; position limit "
                      f"{'none' if limit is None else f'{limit:,.0f} shares'}"),
        ("objective", f"mean over paths of the summed step rewards dW - {objective.risk_aversion:g} / 2 dW^2 "
                      f"(risk aversion per currency unit); VaR/CVaR levels "
                      f"{', '.join(_percent(v) for v in objective.var_levels)}"),
        ("held-out paths", f"{paths:,} paths, seed {metrics.get('heldout_seed')}"
                           + _dates_text(manifest, "heldout", config.horizon_days)),
        ("training paths", f"{manifest.get('sizes', {}).get('train_paths', config.data.train_paths):,} paths, "
                           f"seed {config.data.train_seed}" + _dates_text(manifest, "train", config.horizon_days)),
        ("bootstrap", f"{metrics.get('bootstrap_samples')} paired resamples over paths, "
                      f"seed {metrics.get('bootstrap_seed')}; reference policy: {metrics.get('reference_policy')}"),
        ("run folder", f"{run.path.name.removesuffix('.partial')}, created {manifest.get('created', 'n/a')}"),
        ("config hash", manifest.get("config_hash", "n/a")),
        ("software", f"rehedge {manifest.get('version', 'n/a')}, Python {manifest.get('python', 'n/a')}, "
                     f"numpy {manifest.get('numpy', 'n/a')}, scikit-learn {manifest.get('scikit_learn', 'n/a')}"),
    ]
    tuned = manifest.get("tuned", {})
    if tuned:
        facts.append(("tuned on training paths", "; ".join(
            f"{name}.{key} = {value:.6g}" for name, entry in tuned.items()
            for key, value in entry.items() if key != "train_objective")))
    if records and "mark" in records[0]:
        facts.append(("Black-Scholes mark of the book", f"{format_money(records[0]['mark'])} (currency)"))
    return (f"<h2>Scenario</h2>{_facts_table(facts[:2])}<h3>Book</h3>{book}"
            f"<h3>Market, frictions, objective and data</h3>{_facts_table(facts[2:])}")


def _pricing_text(config, problem) -> str:
    basis = f"{config.pricing.days_per_year:g} days per year"
    marks = getattr(config.market, "marks", "configured")
    if marks == "implied":
        return (f"Black-Scholes marks and premium at the implied volatility of each date (column "
                f"{config.market.implied_volatility_column}), per path; its training mean "
                f"{_percent(problem.marks.volatility)} is the typical level (quotes); {basis}")
    if marks == "realised":
        return (f"Black-Scholes marks at the realised volatility of the training period, "
                f"{_percent(problem.marks.volatility)}; {basis}")
    return f"Black-Scholes marks at volatility {_percent(problem.marks.volatility)}, {basis}"


def _dates_text(manifest: dict, role: str, horizon_days: float) -> str:
    """Dates a historical run's paths come from ('' for a simulated market)."""
    facts = manifest.get("history", {}).get(role)
    if not facts:
        return ""
    text = f"; {facts['source']} of {facts['first_date']} to {facts['last_date']} ({facts['rows']:,} trading days"
    if "windows" in facts:
        text += f", a window every {facts['stride_days']} trading days"
        if role == "heldout" and facts["stride_days"] < horizon_days:
            text += "; windows overlap, so the paired intervals over paths are too narrow"
    else:
        text += f", mean block {facts['mean_block_days']:g} trading days"
    return text + ")"


def _summary_columns(records: list[dict]) -> list[tuple[str, str, object]]:
    """(key, header, format) of the summary table, for the keys the records have."""
    first = records[0]
    risk = sorted((k for k in first if re.fullmatch(r"c?var_[0-9.]+", k)),
                  key=lambda k: (float(k.split("_")[1]), k.startswith("c")))
    columns = [("objective", "objective (currency)", format_money)]
    columns += [("mean_pnl", "mean P&L (currency)", format_money), ("std_pnl", "std P&L (currency)", format_money)]
    for key in risk:
        measure, level = key.split("_")
        columns.append((key, f"{'VaR' if measure == 'var' else 'CVaR'} {level} (currency, loss)", format_money))
    columns += [("mean_cost", "mean cost (currency per path)", format_money),
                ("mean_impact", "mean impact (currency per path)", format_money),
                ("turnover", "turnover (shares traded per share of notional)", format_count),
                ("trades", "trades (per path)", format_count)]
    if "quote_bid" in first:
        columns += [("quote_bid", "bid (currency)", format_money), ("quote_ask", "ask (currency)", format_money),
                    ("spread_bid_vol_points", "bid spread (vol points)", format_count),
                    ("spread_ask_vol_points", "ask spread (vol points)", format_count)]
    return [c for c in columns if c[0] in first]


def _cell(key: str, value, formatter) -> str:
    return f'<td class="num" data-key="{_e(key)}" data-value="{_e(repr(value))}">{_e(formatter(value))}</td>'


def _summary_html(scored: _Scored) -> str:
    records = scored.records
    reference = scored.metrics.get("reference_policy")
    columns = _summary_columns(records)
    has_versus = any("vs_reference" in r for r in records)
    headers = ["#", "policy (kind)", columns[0][1]]
    if has_versus:
        headers += [f"vs {reference}: mean (currency)", "95% CI (currency)", "verdict"]
    headers += [header for _, header, _ in columns[1:]]
    rows = []
    for rank, record in enumerate(records, start=1):
        name, kind = record["name"], record.get("kind", "")
        label = name if kind in ("", name) else f"{name} ({kind})"
        cells = [f'<td class="num">{rank}</td>', f'<td data-key="name">{_e(label)}</td>',
                 _cell(columns[0][0], record[columns[0][0]], columns[0][2])]
        if has_versus:
            versus = record.get("vs_reference")
            if versus is None:
                cells += ['<td class="num">n/a</td>'] * 2 + ["<td></td>"]
            elif name == reference:
                cells += [_cell("vs_reference_mean", versus["mean"], format_signed_money),
                          '<td class="num">reference</td>', "<td></td>"]
            else:
                low, high = versus["ci_low"], versus["ci_high"]
                verdict = "above" if low > 0 else "below" if high < 0 else "not distinguishable"
                cells += [_cell("vs_reference_mean", versus["mean"], format_signed_money),
                          f'<td class="num" data-key="vs_reference_ci" data-value="{_e(repr(low))} {_e(repr(high))}">'
                          f"[{_e(format_signed_money(low))}, {_e(format_signed_money(high))}]</td>",
                          f'<td class="{verdict.split()[0]}">{verdict}</td>']
        cells += [_cell(key, record[key], fmt) for key, _, fmt in columns[1:]]
        rows.append(f'<tr data-policy="{_e(name)}">{"".join(cells)}</tr>')
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    note = ("Ranked by objective (higher is better). Every number is from this run's metrics.json, "
            "formatted; money in the config's currency, costs and P&L per path over the horizon, VaR and "
            "CVaR as positive losses. ")
    if has_versus:
        note += (f"The difference from {reference} is the mean per-path difference in summed reward, with a "
                 f"paired bootstrap 95% interval ({scored.metrics.get('bootstrap_samples')} resamples); "
                 "'above' or 'below' when the interval excludes zero. ")
    if "quote_bid" in records[0]:
        note += ("Bid and ask: mean-variance indifference premiums for the opposite and the configured book; "
                 "spreads are the distance from the Black-Scholes mark in implied-volatility points.")
    return (f'<h2>Summary</h2><p class="muted">{_e(note)}</p><div class="scroll">'
            f'<table class="summary"><thead><tr>{head}</tr></thead><tbody>{"".join(rows)}</tbody></table></div>')


def _figure_html(uri: str, caption: str, alt: str, ident: str) -> str:
    return (f'<figure id="{_e(ident)}"><img src="{uri}" alt="{_e(alt)}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _read_sibling(path: Path) -> tuple[Path, dict, dict]:
    path = Path(path)
    config_file = path / "config.json"
    if not config_file.is_file():
        raise ConfigError(f"{path}: not a run folder (no config.json)")
    return path, _read_metrics(path), json.loads(config_file.read_text())


def build_report(run_dir: Path, siblings: Sequence[Path] = (), staging: bool = False) -> Path:
    """Write ``run_dir/report.html``: one self-contained file (inline CSS, PNG data URIs).

    Parameters
    ----------
    run_dir : Path
        A run folder scored by ``rehedge run`` (with metrics.json and heldout.npz).
    siblings : sequence of Path
        Other run folders of the same sweep; with any, the report adds the
        cost-risk frontier across the runs.
    staging : bool
        ``run_dir`` is the unfinished folder of the run writing it (see rehedge.runner).

    Returns
    -------
    Path
        The report file. A folder that is not a scored run raises ConfigError.
    """
    scored = _load_scored(Path(run_dir), staging)
    others = [_read_sibling(path) for path in siblings if Path(path).resolve() != scored.run.path.resolve()]
    config_order = [spec.name for spec in [*scored.run.config.baselines, *scored.run.config.agents]]
    names = [*config_order, *(r["name"] for r in scored.records if r["name"] not in config_order)]
    colors = _colors(names)
    paths, seed = _sample_path(scored)
    with matplotlib.rc_context(_STYLE):
        figures = [("pnl", "P&L distribution", *_pnl_figure(scored, colors))]
        for name, uri, caption in _map_figures(scored, paths.factors):
            figures.append((f"map-{name}", f"Policy map: {name}", uri, caption))
        figures.append(("cost", "Cost over time", *_cost_figure(scored, colors)))
        figures.append(("path", "One held-out path", *_path_figure(scored, paths, seed, colors)))
        if others:
            figures.append(("frontier", "Cost-risk frontier", *_frontier_figure(scored, others, colors)))
    body = [
        f"<h1>rehedge report: {_e(scored.run.config.name)}</h1>",
        f'<p class="caution" id="caution"><strong>{_e(CAUTION)}</strong></p>',
        _scenario_html(scored),
        _summary_html(scored),
        "<h2>Figures</h2>",
        *(f"<h3>{_e(title)}</h3>{_figure_html(uri, caption, title, ident)}" for ident, title, uri, caption in figures),
    ]
    document = (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>rehedge report: {_e(scored.run.config.name)}</title><style>{_CSS}</style></head>"
        f"<body>{''.join(body)}</body></html>\n"
    )
    target = scored.run.path / "report.html"
    target.write_text(document, encoding="utf-8")
    return target
