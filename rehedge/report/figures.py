"""The report's figures, each a PNG (a data URI for the page, or a file for a sweep's frontier):
the held-out P&L distribution, each agent's policy map with its no-trade region, the cost over
time, one held-out path, and the cost-risk frontier across a sweep's runs."""

from __future__ import annotations

import base64
import io
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import matplotlib
import matplotlib.lines
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from agents.band import NO_TRADE_TOLERANCE, no_trade_band
from agents.registry import AGENTS
from hedge_env.market import GivenPaths
from hedge_env.rollout import rollout
from hedge_env.step import observation_rows
from rehedge.formats import format_days
from rehedge.report.scored import Scored, load_scored, policy_label, read_sibling
from rehedge.tables.export import grid_of, table_nodes

# Our own palette: muted, distinguishable in print and for the common colour-vision deficiencies.
PALETTE = ("#1f4e79", "#d1603d", "#3a8f5c", "#8c5fb0", "#e0a526", "#4fa3c7", "#8a5a44", "#7a7a1e",
           "#5c6b73", "#2a9d8f", "#a3a13b", "#34344a")

STYLE = {
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
# frontier plots (typically no_hedge): it would flatten every other policy.
_OUTLIER_SPREAD = 2.0
# Central quantiles whose range measures a policy's P&L spread (_wide_policies).
_CLIP = (0.005, 0.995)
_MAP_SPOTS = 61
# Gaps from the hedge searched for an agent's no-trade region, per share of notional.
_MAP_OFFSET_RANGE = (1e-5, 0.5)
_MAP_OFFSETS_PER_SIDE = 150



def colors_of(names: Sequence[str]) -> dict[str, str]:
    return {name: PALETTE[i % len(PALETTE)] for i, name in enumerate(names)}


def labels_of(records: Sequence[dict]) -> dict[str, str]:
    """Each scored policy's readable label, by name."""
    return {r["name"]: policy_label(r["name"], r.get("kind", "")) for r in records}




def _figure(width: float, height: float, rows: int = 1, cols: int = 1, **subplot_options):
    figure = Figure(figsize=(width, height), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.subplots(rows, cols, squeeze=False, **subplot_options)
    return figure, axes


def _legend_below(figure: Figure, handles, labels, columns: int = 8) -> None:
    """The figure's legend under its axes, so it never hides a line, in as many columns (up to
    ``columns``) as fit the figure's width: a legend wider than its figure is cut in the PNG."""
    renderer = figure.canvas.get_renderer()
    for ncols in range(min(columns, len(handles)), 0, -1):
        legend = figure.legend(handles, labels, loc="outside lower center", ncols=ncols)
        box = legend.get_window_extent(renderer)
        if box.width <= 0.98 * figure.bbox.width or ncols == 1:
            break
        legend.remove()
    # The figure's height holds its axes and one row of legend; each further row adds its height.
    rows = -(-len(handles) // ncols)
    figure.set_figheight(figure.get_figheight() + (rows - 1) / rows * box.height / figure.dpi)


def cut_parts(figure: Figure) -> list[str]:
    """The parts of ``figure`` (each legend, each visible axes with its title, labels, tick labels
    and texts) that the saved PNG would cut: once drawn, their box reaches outside the figure's.
    Empty for a figure that shows everything."""
    figure.canvas.draw()
    renderer = figure.canvas.get_renderer()
    bounds = figure.bbox
    parts = [(f"legend {i + 1}", legend) for i, legend in enumerate(figure.legends)]
    parts += [(f"axes {i + 1} ({ax.get_title(loc='left') or ax.get_ylabel()})", ax)
              for i, ax in enumerate(figure.axes) if ax.get_visible()]
    cut = []
    for name, artist in parts:
        box = artist.get_tightbbox(renderer)
        if box.x0 < bounds.x0 - 0.5 or box.x1 > bounds.x1 + 0.5 or box.y0 < bounds.y0 - 0.5 or box.y1 > bounds.y1 + 0.5:
            cut.append(name)
    return cut


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


def pnl_figure(scored: Scored, colors: dict[str, str]) -> tuple[str, str]:
    """What separates the policies' P&L: left, each policy's per-path P&L minus the reference
    policy's on the same paths (the paired difference the ranking's intervals rest on); right, the
    left tail, the probability of a P&L at or below each level, on a log scale."""
    names = [r["name"] for r in scored.records]
    labels = labels_of(scored.records)
    pnl = {name: scored.heldout[f"pnl__{name}"] for name in names}
    skipped = _wide_policies(pnl)
    shown = [name for name in names if name not in skipped]
    reference = scored.metrics.get("reference_policy")
    reference = reference if reference in shown else None
    paths = pnl[names[0]].size
    figure, axes = _figure(10.5, 2.5 + 0.32 * len(shown), 1, 2, width_ratios=(1.0, 1.15))
    ax = axes[0, 0]
    if reference is not None:
        rows = [name for name in shown if name != reference]
        for row, name in enumerate(rows):
            difference = pnl[name] - pnl[reference]
            q05, q25, q50, q75, q95 = np.quantile(difference, (0.05, 0.25, 0.5, 0.75, 0.95))
            ax.plot([q05, q95], [row, row], color=colors[name], linewidth=1.2, solid_capstyle="butt")
            ax.plot([q25, q75], [row, row], color=colors[name], linewidth=5.0, solid_capstyle="butt")
            ax.plot(q50, row, marker="|", markersize=9, color="white", markeredgewidth=1.5)
            ax.plot(float(difference.mean()), row, marker="D", markersize=4.5, color="#33312c", linestyle="none")
        ax.set_yticks(range(len(rows)), [f"{names.index(name) + 1}. {labels[name]}" for name in rows])
        ax.set_ylim(len(rows) - 0.5, -0.5)
        ax.axvline(0.0, color="#33312c", linewidth=0.8, linestyle=":")
        ax.set_xlabel(f"P&L minus {labels[reference]}'s, per path (currency)")
        ax.set_title(f"Paired difference from {labels[reference]}")
    else:
        ax.set_visible(False)
    ax = axes[0, 1]
    worst = 0.1  # the worst tenth of the paths
    probability = np.arange(1, paths + 1) / paths
    keep = probability <= worst
    for name in shown:
        ax.plot(np.sort(pnl[name])[keep], probability[keep], color=colors[name], linewidth=1.3,
                label=f"{names.index(name) + 1}. {labels[name]}")
    ax.set_yscale("log")
    ax.set_ylim(1.0 / paths, worst)
    ax.set_xlabel("P&L per path (currency)")
    ax.set_ylabel("share of paths at or below")
    ax.set_title("Left tail of the P&L")
    _legend_below(figure, *ax.get_legend_handles_labels(), columns=4)
    tail = ("the worst tenth of each policy's P&L, the share of paths at or below each P&L on a log scale "
            "down to one path: lower and further right is a thinner left tail. Policies are numbered in rank order.")
    if reference is None:
        caption = f"The left tail of the {paths:,} held-out paths: {tail}"
    else:
        caption = (f"Left: each policy's P&L minus the reference policy's on the same {paths:,} held-out paths; "
                   "the thin bar spans the 5% to 95% quantiles of the per-path difference, the thick one 25% to "
                   "75%, the white tick is the median and the diamond the mean; right of the dotted zero the "
                   f"policy did better on that path. Right: {tail}")
    if skipped:
        caption += (f" Not shown: {', '.join(labels[name] for name in skipped)} (its P&L spread is over "
                    f"{_OUTLIER_SPREAD:g} times the median policy's and would flatten the others; its numbers "
                    "are in the tables).")
    return _png_data_uri(figure), caption


def _ww_band(scored: Scored):
    """The tuned Whalley-Wilmott baseline around the Black-Scholes delta of the run (the maps' hedge),
    else any such baseline, else None."""
    run = scored.run
    candidates = [spec.name for spec in run.config.baselines
                  if spec.kind == "whalley_wilmott" and spec.center == "delta"]
    tuned = [name for name in candidates if name in run.manifest.get("tuned", {})]
    chosen = (tuned or candidates or [None])[0]
    return None if chosen is None else (chosen, run.baselines[chosen])


def _map_times(steps: int) -> list[int]:
    """Early, middle and last decision times. Early is the second decision, not the first: at the
    first every path has the starting spot and no holding, so an agent has seen no other state there."""
    return sorted({min(1, steps - 1), steps // 2, steps - 1})


def _holding_nodes() -> np.ndarray:
    """Holdings around the hedge, per share of notional, that bracket an agent's no-trade edges:
    geometric on each side, so a narrow region and a wide one are both bracketed closely."""
    side = np.geomspace(_MAP_OFFSET_RANGE[0], _MAP_OFFSET_RANGE[1], _MAP_OFFSETS_PER_SIDE)
    return np.concatenate([-side[::-1], [0.0], side])


def policy_map(problem, agent, spot: np.ndarray, k: int, factors: Sequence[float] = ()) -> dict[str, np.ndarray]:
    """An agent's decisions at decision time ``k`` over a spot grid, in shares.

    Returns ``hedge`` (minus the book's Black-Scholes delta), ``target`` (the
    agent's target when holding the hedge) and ``no_trade_low`` /
    ``no_trade_high``: the agent's no-trade edges near the hedge (bracketed by
    :func:`_holding_nodes`, placed by :func:`agents.band.no_trade_band`); NaN
    where it has none.
    """
    notional = problem.notional_shares
    t_days, years = problem.schedule.time_days(k), problem.years_to_horizon(k)
    # A mark volatility the market supplies is the first observed factor (HedgingProblem).
    volatility = float(factors[0]) if problem.mark_volatility_observed and len(factors) else None
    hedge = -problem.book.value_and_delta(spot, t_days, problem.marks, volatility)[1] / notional

    def targets_at(holding_per_notional: np.ndarray) -> np.ndarray:
        shape = np.shape(holding_per_notional)
        rows = observation_rows(problem, np.broadcast_to(spot.reshape(-1, *(1,) * (len(shape) - 1)), shape).ravel(),
                                years, np.ravel(holding_per_notional) * notional, factors)
        return np.asarray(agent.act(rows), dtype=float).reshape(shape)

    holdings = hedge[:, None] + _holding_nodes()[None, :]
    low, high = no_trade_band(targets_at, holdings, targets_at(holdings), NO_TRADE_TOLERANCE)
    return {"hedge": hedge * notional, "target": targets_at(hedge) * notional,
            "no_trade_low": low * notional, "no_trade_high": high * notional}


def _holding_node(run, name: str) -> float | None:
    """Spacing of the holding nodes (shares) of agent ``name``'s hedge table on the run's export grid;
    None for an agent that observes market factors (it has no table)."""
    agent = run.agents[name]
    if getattr(agent, "factor_names", ()) or run.problem.mark_volatility_observed:
        return None  # its table would have a state axis: no one holding grid to compare with
    holds = table_nodes(agent, run.problem, grid_of(run.config.export), run.config.pricing.volatility).holding_shares
    return float(holds[1] - holds[0])


def _band_departure(decisions: dict[str, np.ndarray], half_width: np.ndarray) -> float:
    """Largest distance (shares) between the agent's no-trade edges and the band's around the hedge;
    where the agent has no region its edges are its target."""
    low = np.where(np.isnan(decisions["no_trade_low"]), decisions["target"], decisions["no_trade_low"])
    high = np.where(np.isnan(decisions["no_trade_high"]), decisions["target"], decisions["no_trade_high"])
    hedge = decisions["hedge"]
    return float(max(np.abs(low - (hedge - half_width)).max(), np.abs(high - (hedge + half_width)).max()))


def map_figures(scored: Scored, sample_factors: dict[str, np.ndarray]) -> list[tuple[str, str, str]]:
    run, problem = scored.run, scored.run.problem
    learned = [spec.name for spec in run.config.agents if spec.kind in AGENTS]
    if not learned:
        return []
    kinds = {spec.name: spec.kind for spec in run.config.agents}
    volatility = problem.marks.volatility
    path_volatility = getattr(run.market, "volatility", volatility)
    band = _ww_band(scored)
    band_label = None if band is None else policy_label(band[0], "whalley_wilmott")
    times = _map_times(problem.schedule.steps)
    out = []
    for name in learned:
        agent, label = run.agents[name], policy_label(name, kinds[name])
        # One spot axis for every panel, so the times compare; each panel's lines span its own time's spots.
        figure, axes = _figure(10.5, 5.6, 2, len(times), sharex=True, sharey="row")
        departures = []
        for column, k in enumerate(times):
            # Spots where the paths are at this time (+-2.5 sd of log spot): off them an agent extrapolates.
            spread = 2.5 * path_volatility * math.sqrt(problem.schedule.time_days(k) / problem.marks.days_per_year)
            spot = problem.reference_spot * np.exp(np.linspace(-spread, spread, _MAP_SPOTS))
            factors = [float(sample_factors[f][0, k]) for f in run.market.observed_factors]
            decisions = policy_map(problem, agent, spot, k, factors)
            t_days = problem.schedule.time_days(k)
            hedge = decisions["hedge"]
            mark_volatility = factors[0] if problem.mark_volatility_observed and factors else None
            half_width = None if band is None else band[1].half_width_shares(spot, t_days, mark_volatility)
            if half_width is not None:
                departures.append((t_days, _band_departure(decisions, half_width)))
            # Top: holdings themselves; bottom: their gap from the hedge, where the bands are readable.
            for ax, center in ((axes[0, column], hedge), (axes[1, column], 0.0 * hedge)):
                shift = hedge - center
                ax.fill_between(spot, decisions["no_trade_low"] - shift, decisions["no_trade_high"] - shift,
                                color=PALETTE[5], alpha=0.3, linewidth=0, label=f"{label}: no-trade region")
                if half_width is not None:
                    for sign in (-1.0, 1.0):
                        ax.plot(spot, center + sign * half_width, color=PALETTE[1], linewidth=1.0, linestyle="--",
                                label=band_label if sign > 0 else None)
                ax.plot(spot, center, color="#33312c", linewidth=1.0, linestyle=":", label="Black-Scholes hedge")
                ax.plot(spot, decisions["target"] - shift, color=PALETTE[0], linewidth=1.8, label=f"{label}: target")
            days_left = problem.schedule.horizon_days - t_days
            axes[0, column].set_title(f"day {t_days:g}, {format_days(days_left)} to horizon")
            axes[1, column].set_xlabel("spot (currency per share)")
        axes[0, 0].set_ylabel("holding (shares)")
        axes[1, 0].set_ylabel("holding - hedge (shares)")
        _legend_below(figure, *axes[0, 0].get_legend_handles_labels())
        low, high = (problem.notional_shares * edge for edge in _MAP_OFFSET_RANGE)
        at = (f"{100 * volatility:g}% volatility" if not problem.mark_volatility_observed
              else "the mark volatility of the first held-out path at each time")
        caption = (f"{label}: target holding (shares) against spot when the current holding is the "
                   f"Black-Scholes hedge (minus the book's delta at {at}), over the spots within 2.5 standard "
                   "deviations of log spot at each time (about 99% of paths), on one spot axis; below, the same "
                   f"as gaps from the hedge. The shaded region is where the agent does not trade (target equal to the holding "
                   f"within {NO_TRADE_TOLERANCE:g} of the {problem.notional_shares:,.0f}-share notional): its "
                   f"edges are bracketed from {low:.3g} to {high:,.0f} shares either side of the hedge and placed "
                   "by bisection on the agent, as in the hedge tables.")
        if band is not None:
            tuned = band[0] in run.manifest.get("tuned", {})
            caption += (f" Dashed: the {band_label} (risk aversion {band[1].risk_aversion:.6g}"
                        f"{', tuned on the training paths' if tuned else ''}).")
            caption += _departure_text(departures, _holding_node(run, name), band_label)
        out.append((name, _png_data_uri(figure), caption))
    return out


def _departure_text(departures: list[tuple[float, float]], node: float | None, band_label: str) -> str:
    """The caption's sentence on where the agent's no-trade region leaves the band."""
    worst = max(departures, key=lambda item: item[1])
    if node is None:
        return (f" Its no-trade edges are up to {worst[1]:,.0f} shares from the band's (day {worst[0]:g}); "
                "the agent observes market factors, so it has no hedge table to compare with.")
    outside = [f"day {day:g} ({gap:,.0f} shares)" for day, gap in departures if gap > node]
    if not outside:
        return (f" At every time shown its no-trade edges stay within one holding node of its hedge table "
                f"({node:,.0f} shares) of the {band_label}'s.")
    return (f" Its no-trade region leaves the {band_label} by more than one holding node of its hedge table "
            f"({node:,.0f} shares) at {', '.join(outside)}: there it trades differently from the band by more "
            "than the table can show.")


def cost_figure(scored: Scored, colors: dict[str, str]) -> tuple[str, str]:
    schedule = scored.run.problem.schedule
    names, labels = [r["name"] for r in scored.records], labels_of(scored.records)
    days = schedule.step_days * np.arange(0, schedule.steps + 1)
    figure, axes = _figure(9.0, 3.4)
    ax = axes[0, 0]
    for name in names:
        cumulative = np.concatenate([[0.0], np.cumsum(scored.heldout[f"step_cost__{name}"])])
        ax.plot(days, cumulative, color=colors[name], label=labels[name], marker="o", markersize=2.5)
    ax.set_xlabel("time (days from start)")
    ax.set_ylabel("cumulative mean cost per path (currency)")
    ax.set_title("Trading and impact cost over the horizon")
    ax.set_xlim(0, schedule.horizon_days)
    _legend_below(figure, *ax.get_legend_handles_labels())
    caption = ("Mean over held-out paths of the proportional, fixed and impact costs paid up to the end of "
               "each rehedge interval (the trade at its start included); the last point includes the unwind "
               "at the horizon.")
    return _png_data_uri(figure), caption


def sample_path(scored: Scored):
    run, problem = scored.run, scored.run.problem
    steps = problem.schedule.steps
    seed = scored.metrics.get("heldout_seed", run.config.data.heldout_seed)
    paths = (run.heldout_market or run.market).generate(1, steps, problem.dt_years, seed)
    return paths, seed


def path_figure(scored: Scored, paths, seed: int, colors: dict[str, str]) -> tuple[str, str]:
    run, problem = scored.run, scored.run.problem
    schedule = problem.schedule
    policies = {**run.baselines, **run.agents}
    names = [r["name"] for r in scored.records if r["name"] in policies]
    labels = labels_of(scored.records)
    days = schedule.step_days * np.arange(0, schedule.steps + 1)
    figure, axes = _figure(9.0, 3.6)
    ax = axes[0, 0]
    # The market's observed factors (e.g. a variance) go with the path into the observations.
    source = GivenPaths(paths, observed_factors=run.market.observed_factors)
    for name in names:
        held = rollout(problem, policies[name], source, 1, keep_holdings=True, name=name).holdings[0]
        # Holding over each rehedge interval; repeated at the horizon so the last interval shows.
        ax.plot(days, np.append(held, held[-1]), color=colors[name], drawstyle="steps-post", label=labels[name])
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


def _is_seed(key: str) -> bool:
    """A dotted config key that only reseeds the paths (``seed``, ``data.heldout_seed``)."""
    return key.rsplit(".", 1)[-1] == "seed" or key.endswith("_seed")


@dataclass(frozen=True, eq=False)
class Setting:
    """The runs of a sweep that differ only in their seeds: one point of the frontier."""

    values: tuple  # of the differing keys other than seeds, in ``Frontier.keys`` order
    runs: tuple  # (path, metrics) of each seed's run

    def mean(self, name: str, key: str) -> float | None:
        """The mean over the setting's runs of a policy's metric (None where a run lacks it)."""
        found = [next((r.get(key) for r in metrics["policies"] if r["name"] == name), None) for _, metrics in self.runs]
        return None if not found or any(value is None for value in found) else float(np.mean(found))


@dataclass(frozen=True)
class Frontier:
    """A sweep's runs grouped into settings (seeds averaged), joined along ``keys[0]``: a cost key
    when one differs, else the first differing key; the other keys tell lines apart."""

    keys: tuple[str, ...]
    settings: tuple[Setting, ...]
    seeds: int

    def label(self, setting: Setting, keys=None) -> str:
        keys = self.keys if keys is None else keys
        return ", ".join(f"{key.rsplit('.', 1)[-1]}={json.dumps(setting.values[self.keys.index(key)])}"
                         for key in keys) or "this run"

    def lines(self) -> list[tuple[tuple, list[Setting]]]:
        """The settings that share every key but the joined one, each group in the joined key's order."""
        groups: dict[str, tuple[tuple, list[Setting]]] = {}
        for setting in self.settings:
            others = setting.values[1:]
            groups.setdefault(json.dumps(others, sort_keys=True), (others, []))[1].append(setting)
        return list(groups.values())


def _sort_value(value):
    return (0, value, "") if isinstance(value, (int, float)) else (1, 0, json.dumps(value))


def frontier_of(variants: list[tuple[Path, dict, dict]], swept: Sequence[str] = ()) -> Frontier:
    """Group runs by the settings that differ between them (the ``swept`` dotted keys when given),
    seeds apart, in the order of those settings."""
    flats = [_flatten({k: v for k, v in config.items() if k not in ("name", "description", "sweep")})
             for _, _, config in variants]
    # Without the swept keys, the scalar settings that differ: a list (the baselines) can differ only
    # through a setting it derives from (Leland's cost rate follows the frictions').
    candidates = list(swept) or sorted({k for flat in flats for k, v in flat.items() if not isinstance(v, list)})
    differing = [k for k in candidates if len({json.dumps(flat.get(k), sort_keys=True) for flat in flats}) > 1]
    seeds = [k for k in differing if _is_seed(k)]
    keys = [k for k in differing if not _is_seed(k)][:3]
    keys.sort(key=lambda k: "cost" not in k.rsplit(".", 1)[-1])  # a cost key first (stable otherwise)
    grouped: dict[str, tuple[tuple, list]] = {}
    for (path, metrics, _), flat in zip(variants, flats):
        values = tuple(flat.get(k) for k in keys)
        grouped.setdefault(json.dumps(values, sort_keys=True), (values, []))[1].append((path, metrics))
    order = sorted(grouped.values(), key=lambda group: [_sort_value(v) for v in (*group[0][1:], *group[0][:1])])
    settings = tuple(Setting(values, tuple(runs)) for values, runs in order)
    return Frontier(tuple(keys), settings, max(len(s.runs) for s in settings) if seeds else 1)


_MARKERS = "osD^v<>ph*"


def frontier_figure(scored: Scored, siblings: list[tuple[Path, dict, dict]],
                     colors: dict[str, str]) -> tuple[str, str]:
    figure, caption = _frontier_plot(scored, siblings, colors)
    return _png_data_uri(figure), caption


def write_frontier(run_dirs: Sequence[Path], target: Path, swept: Sequence[str] = ()) -> Path:
    """The cost-risk frontier across scored run folders (the cells of a sweep, labelled by the
    ``swept`` dotted keys) as a PNG file."""
    scored = load_scored(Path(run_dirs[0]))
    others = [read_sibling(path) for path in run_dirs[1:]]
    config_order = [spec.name for spec in [*scored.run.config.baselines, *scored.run.config.agents]]
    colors = colors_of([*config_order, *(r["name"] for r in scored.records if r["name"] not in config_order)])
    with matplotlib.rc_context(STYLE):
        figure, _ = _frontier_plot(scored, others, colors, swept)
        figure.savefig(target, format="png", dpi=_DPI, metadata={"Software": None})
    return Path(target)


def _frontier_plot(scored: Scored, siblings: list[tuple[Path, dict, dict]], colors: dict[str, str],
                   swept: Sequence[str] = ()):
    here = (scored.run.path, scored.metrics, scored.run.config.model_dump(mode="json"))
    frontier = frontier_of([here, *siblings], swept)
    names, policy_labels = [r["name"] for r in scored.records], labels_of(scored.records)
    skipped = _wide_policies({name: scored.heldout[f"pnl__{name}"] for name in names})
    tail_key = "cvar_95" if "cvar_95" in scored.records[0] else next(
        (k for k in scored.records[0] if k.startswith("cvar_")), "std_pnl")
    risk_keys = (("std_pnl", "std of P&L per path (currency)"),
                 (tail_key, f"CVaR {tail_key[5:]} of the loss (currency)"))
    lines = frontier.lines()
    styles = ("-", "--", ":", "-.")
    figure, axes = _figure(10.5, 3.8, 1, 2, sharey=True)
    markers = {setting: _MARKERS[i % len(_MARKERS)] for i, setting in enumerate(frontier.settings)}
    for ax, (key, label) in zip(axes[0], risk_keys):
        for name in names:
            if name in skipped:
                continue
            for line, (_, settings) in enumerate(lines):
                points = [(setting.mean(name, key), setting.mean(name, "mean_cost"), setting.mean(name, "mean_impact"),
                           setting) for setting in settings]
                points = [(x, cost + impact, setting) for x, cost, impact, setting in points
                          if x is not None and cost is not None and impact is not None]
                if not points:
                    continue
                x, y, _ = zip(*points)
                ax.plot(x, y, color=colors[name], linewidth=1.2, linestyle=styles[line % len(styles)],
                        label=policy_labels[name] if line == 0 else None)
                for xi, yi, setting in points:
                    ax.plot(xi, yi, linestyle="none", marker=markers[setting], markersize=5, color=colors[name])
        ax.set_xlabel(label)
        ax.set_title(f"Cost against {'std of P&L' if key == 'std_pnl' else label.split(' of')[0]}")
    axes[0, 0].set_ylabel("mean trading + impact cost per path (currency)")
    handles, legend_labels = axes[0, 0].get_legend_handles_labels()
    for setting, marker in markers.items():
        handles.append(matplotlib.lines.Line2D([], [], linestyle="none", marker=marker, markersize=5, color="#5c6b73"))
        legend_labels.append(frontier.label(setting))
    if len(lines) > 1:
        for line, (_, settings) in enumerate(lines):
            handles.append(matplotlib.lines.Line2D([], [], linestyle=styles[line % len(styles)], color="#5c6b73"))
            legend_labels.append(frontier.label(settings[0], frontier.keys[1:]))
    _legend_below(figure, handles, legend_labels)
    averaged = (f", each the mean of its {frontier.seeds} seeds' runs" if frontier.seeds > 1 else "")
    joined = (f"joined in the order of {frontier.keys[0].rsplit('.', 1)[-1]}" if frontier.keys else "")
    caption = ("Cost-risk frontier: mean trading + impact cost per path against the spread of P&L, one marker "
               f"per setting of the sweep{averaged} ("
               + "; ".join(f"{frontier.label(s)}: {', '.join(path.name for path, _ in s.runs)}"
                           for s in frontier.settings)
               + (f"), a policy's points {joined}" if joined else ")")
               + (", one line style per value of the other settings" if len(lines) > 1 else "")
               + ". Numbers from each run's metrics.json.")
    if skipped:
        caption += (f" Not shown: {', '.join(policy_labels[name] for name in skipped)} (its P&L spread is over "
                    f"{_OUTLIER_SPREAD:g} times the median policy's).")
    return figure, caption
