"""What every screen of rehedge shares: the caution, number formats and the metric columns.

The command line, the report and the hedge-table advice print from here, so a
number looks the same and a column means the same wherever it appears. Imports
the standard library only (``rehedge advise`` starts without numpy's friends).
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass

CAUTION = (
    "Decision support, not advice: a policy is only as good as the market model and data it was "
    "trained on; check positions, limits and fills against the desk's own risk systems and the "
    "rules that apply where you trade."
)


def format_money(value: float | None) -> str:
    """Currency amounts: whole units from 100, cents from 1, three significant digits below 1."""
    if value is None or not math.isfinite(value):
        return "n/a"
    if abs(value) >= 100:
        return f"{value:,.0f}"
    if abs(value) < 1:
        return f"{value:,.3g}"
    return f"{value:,.2f}"


def money_formatter(values) -> Callable[[float | None], str]:
    """One format for a column of currency amounts, with the decimals its largest needs (as
    :func:`format_money` gives that one: whole units from 100, cents from 1, three significant digits
    below), so that every row of the column has the same decimals."""
    sizes = [abs(v) for v in values if v is not None and math.isfinite(v)]
    top = max(sizes, default=0.0)
    decimals = 0 if top >= 100 else 2 if top >= 1 or top == 0 else min(2 - math.floor(math.log10(top)), 12)

    def formatted(value: float | None) -> str:
        if value is None or not math.isfinite(value):
            return "n/a"
        return f"{value:,.{decimals}f}"

    return formatted


def format_signed_money(value: float | None) -> str:
    """A difference in currency, always signed."""
    text = format_money(value)
    return text if text.startswith("-") or text == "n/a" else "+" + text


def format_interval(mean: float, low: float, high: float) -> str:
    """A signed difference with its interval, as the report shows it: ``+50.42 [+41.00, +59.92]``."""
    return f"{format_signed_money(mean)} [{format_signed_money(low)}, {format_signed_money(high)}]"


def format_count(value: float | None) -> str:
    """Turnover, trades per path and volatility points: two decimals."""
    if value is None or not math.isfinite(value):
        return "n/a"
    return f"{value:,.2f}"


@dataclass(frozen=True)
class MetricColumn:
    """One metric of a policy's held-out record: its key, a short header (terminal), a long header
    with units (report), its format, and whether the terminal's ranked table shows it."""

    key: str
    short: str
    long: str
    format: Callable[[float | None], str]
    on_terminal: bool = True

    def formatter(self, values) -> Callable[[float | None], str]:
        """The format of this column over ``values`` (all its rows): money with one number of
        decimals for the whole column, anything else as :attr:`format`."""
        return money_formatter(values) if self.format is format_money else self.format


def metric_columns(record: dict, currency: str = "currency") -> list[MetricColumn]:
    """The metric columns of a held-out record, in display order, for the keys it has: objective,
    P&L, every VaR and CVaR level (ascending, VaR first), entropic risk, costs, turnover, trades and,
    when quoted, the bid and ask."""
    levels = sorted({k.split("_")[1] for k in record if re.fullmatch(r"c?var_[0-9.]+", k)}, key=float)
    columns = [
        MetricColumn("objective", "objective", f"objective ({currency}, higher is better)", format_money),
        MetricColumn("mean_pnl", "mean P&L", f"mean P&L ({currency})", format_money),
        MetricColumn("std_pnl", "std P&L", f"std P&L ({currency})", format_money),
    ]

    def tail(key: str, short: str, long: str, on_terminal: bool = False) -> list[MetricColumn]:
        """A tail figure and its bootstrap interval's bounds (shown with --wide and in the report)."""
        return [MetricColumn(key, short, f"{long} ({currency}, loss)", format_money, on_terminal),
                *(MetricColumn(f"{key}_ci_{end}", f"{short} 95% {end}", f"{long}, 95% interval {end} ({currency})",
                               format_money, on_terminal=False) for end in ("low", "high"))]

    for level in levels:
        columns += tail(f"var_{level}", f"VaR {level}", f"VaR {level}")
        columns += tail(f"cvar_{level}", f"CVaR {level}", f"CVaR {level}", on_terminal=True)
    columns.append(MetricColumn("ce_effective_paths", "CE paths",
                                "certainty equivalent's effective paths (of all held out)", format_count))
    columns += tail("entropic_risk", "entropic", "entropic risk")
    columns += [
        MetricColumn("mean_cost", "cost", f"mean cost ({currency} per path)", format_money),
        MetricColumn("mean_impact", "impact", f"mean impact ({currency} per path)", format_money),
        MetricColumn("turnover", "turnover", "turnover (shares traded per share of notional)", format_count,
                     on_terminal=False),
        MetricColumn("trades", "trades", "trades (per path)", format_count),
        MetricColumn("quote_bid", "bid", f"bid ({currency})", format_money, on_terminal=False),
        MetricColumn("quote_ask", "ask", f"ask ({currency})", format_money, on_terminal=False),
        MetricColumn("spread_bid_vol_points", "bid spread (vol pts)", "bid spread (vol points)", format_count,
                     on_terminal=False),
        MetricColumn("spread_ask_vol_points", "ask spread (vol pts)", "ask spread (vol points)", format_count,
                     on_terminal=False),
    ]
    return [column for column in columns if column.key in record]


def format_days(value: float) -> str:
    """A number of days, with its unit."""
    return f"{value:g} day" if value == 1 else f"{value:g} days"


def format_percent(value: float) -> str:
    """A rate as a percentage: 0.2 -> 20%."""
    return f"{100 * value:g}%"


# Tail measures (VaR, CVaR) on fewer held-out paths than this rest on a handful of paths.
TAIL_PATHS = 100


def heldout_text(n_paths: int, asked: int, seed: int | None, fixed_windows: bool) -> str:
    """What the held-out paths were: their count (and what the config asked for, when a history had
    fewer windows) and the seed, which fixed windows of a history do not have."""
    if fixed_windows:
        text = f"{n_paths:,} held-out windows of the history"
        return text + (f" (all it has; data.heldout_paths asks for {asked:,})" if n_paths < asked else "")
    return f"{n_paths:,} held-out paths, seed {seed}"


# Below this share of the held-out paths effectively counting in a certainty equivalent, its bootstrap
# interval is not to be trusted (docs/references.md, "Certainty-equivalent intervals": on a short-gamma
# toy the interval covered 0.94-0.96 while the median share stayed >= 0.6, then 0.90, 0.81, 0.70 at
# 0.40, 0.22, 0.11).
CE_PATHS_SHARE_MIN = 0.5


def ce_caution(records: list[dict]) -> str | None:
    """A warning naming the policies whose certainty equivalent rests on under
    :data:`CE_PATHS_SHARE_MIN` of the held-out paths (the weights exp(-gamma P&L) of a heavy left
    tail), else None."""
    thin = [(r["name"], r["ce_effective_paths"] / r["paths"]) for r in records
            if r.get("ce_effective_paths") is not None and r.get("paths")
            and r["ce_effective_paths"] < CE_PATHS_SHARE_MIN * r["paths"]]
    if not thin:
        return None
    named = ", ".join(f"{name} {share:.1%}" for name, share in thin)
    return (f"warning: the certainty equivalents of {named} rest on under {CE_PATHS_SHARE_MIN:.0%} of the paths "
            "(their worst paths weigh most): their intervals are not to be trusted; use more paths or a lower "
            "risk aversion")


def tail_caution(n_paths: int) -> str | None:
    """A warning when VaR and CVaR rest on fewer than :data:`TAIL_PATHS` paths, else None."""
    if n_paths >= TAIL_PATHS:
        return None
    return (f"VaR and CVaR rest on {n_paths} paths (fewer than {TAIL_PATHS}): their tails are a handful of "
            "paths; read them with care")
