"""The Policy protocol shared by baselines, learned agents, the grid DP and hedge tables."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np

from hedge_env.problem import HedgingProblem


@runtime_checkable
class Policy(Protocol):
    """Maps observations to target holdings.

    ``act(obs)`` takes an (n, n_obs) array of observations
    ``[spot / reference spot, years to horizon, holding / notional, *factors]``
    and returns an (n,) array of target holdings per share of notional. It is
    vectorized and keeps no state between calls.

    A policy may also define ``act_with_delta(obs, book_delta)``, where
    ``book_delta`` is the book's delta in shares at the mark volatility, as
    the step function computed it for these rows. The rollout then calls it
    instead of ``act``, sparing a second pricing pass; it must return the
    same targets as ``act``.

    A kind in ``agents.registry`` also carries a class attribute ``label``: its
    readable name in reports ("Whalley-Wilmott band", "no hedge").
    """

    name: str

    def act(self, obs: np.ndarray) -> np.ndarray: ...


@dataclass(frozen=True)
class DecodedObservation:
    """Observation rows in trade units.

    ``t_days`` is a float when every row is at the same time (the usual case
    in a rollout, and the fast path of pricing), else an array.
    ``volatility`` is the mark volatility per row when the market supplies it
    (``problem.mark_volatility_observed``), else None (``problem.marks.volatility``).
    """

    spot: np.ndarray
    t_days: float | np.ndarray
    holding_shares: np.ndarray
    volatility: np.ndarray | None = None


def decode(problem: HedgingProblem, obs: np.ndarray) -> DecodedObservation:
    """Spot (currency), time elapsed (days), holding (shares) and, when observed, the mark
    volatility (annual decimal) of observation rows."""
    obs = np.asarray(obs)
    years_left = obs[:, 1]
    if years_left.size and (years_left == years_left[0]).all():
        t_days: float | np.ndarray = float(problem.days_from_years_to_horizon(years_left[0]))
    else:
        t_days = problem.days_from_years_to_horizon(years_left)
    spot = obs[:, 0] * problem.reference_spot
    volatility = np.asarray(obs[:, 3], dtype=float) if problem.mark_volatility_observed else None
    return DecodedObservation(spot.astype(float, copy=False), t_days, obs[:, 2] * problem.notional_shares,
                              volatility)


class Solves:
    """What an agent kind solves, declared on its class and read by the config's rules
    (rehedge.schema.rules): the market models (None: any, for an agent that learns from paths) and
    their words, whether it needs the model's marks with their state observed, and whether it models
    permanent impact under an objective kind. The defaults: anything."""

    solves_markets: tuple[str, ...] | None = None
    market_words = ""
    needs_model_state = False

    @classmethod
    def models_permanent_impact(cls, objective_form) -> bool:
        return True


@dataclass(frozen=True)
class Mirrored:
    """A policy for the opposite book: ``act(obs) = -policy.act(obs with the holding negated)``.

    With zero drift and symmetric frictions the opposite book's problem is the
    mirror image of the original, so this is its hedge; a learned agent is not
    re-trained (borrow fees and drift break the symmetry a little).
    """

    policy: object

    @property
    def name(self) -> str:
        return getattr(self.policy, "name", type(self.policy).__name__)

    def act(self, obs: np.ndarray) -> np.ndarray:
        mirrored = np.array(obs, dtype=float, copy=True)
        mirrored[:, 2] *= -1.0
        return -np.asarray(self.policy.act(mirrored))
