"""The no-trade band of any policy, read off the policy itself.

A policy keeps its holding inside its no-trade region and trades to its edge
(or past it) from outside. :func:`no_trade_band` finds, at each point (a time
and a spot), the lower edge (where the policy stops buying as the holding
rises) and the upper edge (where it starts selling): each is bracketed by two
holding nodes, or is the end of the holding range searched, and placed by
bisection on the policy, so a band narrower than the node spacing is found too.
The hedge-table exporter and the report's policy maps both use it.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

# A trade smaller than this fraction of the book's notional shares counts as no trade: policies that
# keep the holding return it up to rounding.
NO_TRADE_TOLERANCE = 1e-7
# Bisection steps that place each edge between two holding nodes (2^-40 of a node spacing).
BAND_BISECTIONS = 40


def no_trade_band(targets_at: Callable[[np.ndarray], np.ndarray], holdings: np.ndarray, targets: np.ndarray,
                  tolerance: float, bisections: int = BAND_BISECTIONS) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper no-trade edges at every point; NaN where none is found.

    Parameters
    ----------
    targets_at : callable
        ``targets_at(h)`` with ``h`` of shape ``targets.shape[:-1]`` (one holding per point) returns
        the policy's targets there, in the units of ``holdings``.
    holdings : ndarray (..., n)
        Ascending holding nodes along the last axis, broadcastable to ``targets``.
    targets : ndarray (..., n)
        The policy's targets at ``holdings``.
    tolerance : float
        Largest trade, in the units of ``holdings``, that counts as none.

    A policy that sells below where it buys has no band there (NaN).
    """
    holdings = np.broadcast_to(holdings, targets.shape)
    trade = targets - holdings
    n = holdings.shape[-1]
    edges = []
    for keeps, upward in ((lambda t: t <= tolerance, True), (lambda t: t >= -tolerance, False)):
        # keeps: not buying (lower edge) or not selling (upper edge). Lower edge: first node that does
        # not buy, searched upward; upper edge: last node that does not sell, searched downward. The
        # node before it (which trades) brackets the edge.
        ok = keeps(trade)
        found = ok.any(axis=-1)
        if upward:
            index = ok.argmax(axis=-1)
            neighbour = index - 1
        else:
            index = n - 1 - ok[..., ::-1].argmax(axis=-1)
            neighbour = index + 1
        inner = np.take_along_axis(holdings, index[..., None], axis=-1)[..., 0]
        at_end = (neighbour < 0) | (neighbour >= n)
        beside = np.take_along_axis(holdings, np.clip(neighbour, 0, n - 1)[..., None], axis=-1)[..., 0]
        outer = np.where(at_end, inner, beside)
        for _ in range(bisections):
            middle = 0.5 * (inner + outer)
            inside = keeps(targets_at(middle) - middle)
            inner, outer = np.where(inside, middle, inner), np.where(inside, outer, middle)
        edges.append(np.where(found, inner, np.nan))
    lower, upper = edges
    crossed = lower > upper
    return np.where(crossed, np.nan, lower), np.where(crossed, np.nan, upper)
