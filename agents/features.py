"""Basis functions of a state and a candidate target holding.

State features are computed once per observation row and shared by every
candidate action of that row; action features broadcast over an (n, C)
array of candidates. Units: holdings and targets per share of notional,
moneyness as log(spot / reference spot), years to the horizon.

Names of the basis (``FEATURES``):

=============  ===============================================================
moneyness      m = log(S / reference spot)
years_left     years to the horizon
holding        current holding h
hedge          the hedge the agent is anchored on, delta_h = -book delta / notional: Black-Scholes
               at the mark volatility (the model's delta under Merton marks), or the agent's
               ``anchor`` (model_delta, minimum_variance_delta)
gamma          book gamma x S / notional: change of the hedge per unit log move
hat0..hat8     tent functions of the standardised moneyness m / (vol sqrt(years left + dt)),
               on 9 knots from -3 to 3 (clamped beyond): a local basis in moneyness
target         candidate target a
gap            x = a - delta_h, distance of the target from the hedge
abs_gap        |x|
trade          d = a - h
abs_trade      |d|
=============  ===============================================================

plus observable market factors by name, and products written ``"gap*moneyness"``
or powers ``"gap^2"`` (any names above, joined by ``*``; a power by ``^``).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from agents.baselines import band_center
from agents.policy import decode
from hedge_env.problem import HedgingProblem

HAT_KNOTS = np.linspace(-3.0, 3.0, 9)
HATS = tuple(f"hat{i}" for i in range(len(HAT_KNOTS)))
STATE_FEATURES = ("moneyness", "years_left", "holding", "hedge", "gamma") + HATS
ACTION_FEATURES = ("target", "gap", "abs_gap", "trade", "abs_trade")
FEATURES = STATE_FEATURES + ACTION_FEATURES

# The linear agent's default basis: terms that vary with the target (it is fitted within
# states, so terms of the state alone would carry nothing). Enough to carry the mean-variance
# reward of one step (quadratic in the gap, scaled by spot and gamma) and the cost-to-go of the
# later ones (kinked in the gap and, near the horizon, in the unwound holding). The target
# itself is left out: within a state it differs from the gap by a constant.
POLYNOMIAL_BASIS = (
    "gap", "gap*moneyness", "gap*moneyness^2", "gap*gamma",
    "gap^2", "gap^2*moneyness", "gap^2*moneyness^2", "gap^2*gamma", "gap^2*gamma^2",
    "gap^3", "gap^3*moneyness", "gap^4",
    "abs_gap", "abs_gap*moneyness", "abs_gap*moneyness^2", "abs_gap*gamma",
    "target^2", "abs_target", "abs_target*moneyness",
)

# Terms the linear agent adds per observed market factor f (its default basis): the factor shifts the
# best target (a hedge that leans with the variance) and the risk of being away from it.
FACTOR_TERMS = ("gap*{f}", "gap*moneyness*{f}", "gap^2*{f}", "abs_gap*{f}")


# Terms of the state alone that the exponential objective's fits add: under exponential utility the
# value's level across next states is not common to the tried targets (how it moves with the next spot
# is a risk the hedge takes on), so it is fitted. A polynomial in the hedge and gamma: bounded features,
# so the level cannot blow up off the states a decision time saw. (Tents in moneyness did as well on
# the reference case but, at early decision times where the outer tents see almost no state, one took
# a coefficient of 800 whose value at the next step's states was squared by the variance stage, step
# after step, to 1e146.)
LEVEL_TERMS = ("1", "hedge", "hedge^2", "hedge^3", "gamma", "gamma^2", "hedge*gamma")
LEVEL_FACTOR_TERMS = ("{f}", "{f}^2", "{f}*hedge", "{f}*gamma")


def level_basis(factor_names: tuple[str, ...] = ()) -> tuple[str, ...]:
    """The state's terms the exponential objective's fits add: ``LEVEL_TERMS`` and, per observed
    factor, ``LEVEL_FACTOR_TERMS``."""
    return LEVEL_TERMS + tuple(term.format(f=name) for name in factor_names for term in LEVEL_FACTOR_TERMS)


# What the exponential objective's default basis adds: a curvature in the gap that differs above and
# below the hedge. Measured on the reference case at 50 bps (scratch seeds, 60,000 training paths): the
# linear agent's share of the optimum's certainty-equivalent gain went from 94.8% to 97.1% (97.5% and
# 97.6% at 10 bps); terms in the hedge did as well at 50 bps and no better at 10 bps, tents times the gap worse.
EXPONENTIAL_TERMS = ("abs_gap*gap",)


def fitted_basis(basis, factor_names: tuple[str, ...], exponential: bool) -> tuple[str, ...]:
    """A linear fit's terms: ``basis``, or the default ``polynomial_basis`` when None, and under the
    exponential objective the ``level_basis`` terms it lacks."""
    terms = polynomial_basis(factor_names, exponential) if basis is None else tuple(basis)
    if exponential:
        terms += tuple(term for term in level_basis(factor_names) if term not in terms)
    return terms


def polynomial_basis(factor_names: tuple[str, ...] = (), exponential: bool = False) -> tuple[str, ...]:
    """The linear agent's default basis: ``POLYNOMIAL_BASIS`` (and ``EXPONENTIAL_TERMS`` under the
    exponential objective) and ``FACTOR_TERMS`` of each observed factor."""
    return (POLYNOMIAL_BASIS + (EXPONENTIAL_TERMS if exponential else ())
            + tuple(term.format(f=name) for name in factor_names for term in FACTOR_TERMS))


# Raw columns for a tree ensemble, which finds its own interactions.
TREE_BASIS = ("moneyness", "hedge", "gamma", "target", "gap", "abs_gap")
# The same without the hedge and the target, which move with the market state when the agent is
# anchored on a hedge at a stochastic-volatility model's Greeks: what is left is a function of
# moneyness and the gap at a decision time, so the trees still tabulate (the linear stage carries the state).
TREE_BASIS_STATE_ANCHOR = ("moneyness", "gamma", "gap", "abs_gap")


@dataclass(frozen=True)
class StateFeatures:
    """Per-row quantities of a batch of observations (arrays of shape (n,))."""

    values: dict[str, np.ndarray]
    spot: np.ndarray
    holding_shares: np.ndarray

    @property
    def hedge(self) -> np.ndarray:
        return self.values["hedge"]

    @property
    def holding(self) -> np.ndarray:
        return self.values["holding"]

    def __len__(self) -> int:
        return self.spot.shape[0]

    def with_holding(self, holding: np.ndarray, notional_shares: float) -> StateFeatures:
        """The same states at another holding (per share of notional), as their observations with
        that holding would give (agents.policy.decode)."""
        return StateFeatures({**self.values, "holding": holding}, self.spot, holding * notional_shares)

    def rows(self, selection: slice) -> StateFeatures:
        """The features of a block of rows (views, no copies)."""
        return StateFeatures({name: value[selection] for name, value in self.values.items()},
                             self.spot[selection], self.holding_shares[selection])


def state_features(problem: HedgingProblem, obs: np.ndarray, factor_names: tuple[str, ...] = (),
                   anchor: str = "delta") -> StateFeatures:
    """State features of observation rows ``[spot/ref, years left, holding/notional, *factors]``,
    with ``hedge`` the ``anchor`` (agents.baselines.BAND_CENTERS)."""
    decoded = decode(problem, obs)
    notional = problem.notional_shares
    book, marks = problem.book, problem.marks
    volatility = decoded.volatility  # per row when the market supplies the mark volatility, else None
    # The hedge the agent is anchored on. "delta": the mark model's delta when it is a function of spot
    # and time alone (Merton), else Black-Scholes at the mark volatility. A hedge at a Heston model's
    # Greeks depends on the variance too: a table in moneyness and gap (the fitted-Q agent's) cannot hold it.
    if anchor != "delta":
        book_delta = -band_center(problem, anchor, obs)[0]
    elif problem.mark_model is not None and problem.mark_model.state_factor is None:
        _, book_delta = problem.book_value_and_delta(decoded.spot, decoded.t_days)
    else:
        _, book_delta = book.value_and_delta(decoded.spot, decoded.t_days, marks, volatility)
    gamma = book.gamma(decoded.spot, decoded.t_days, marks, volatility)
    values = {
        "moneyness": np.log(obs[:, 0]),
        "years_left": np.asarray(obs[:, 1], dtype=float),
        "holding": np.asarray(obs[:, 2], dtype=float),
        "hedge": -book_delta / notional,
        "gamma": gamma * decoded.spot / notional,
    }
    scale = (marks.volatility if volatility is None else volatility) * np.sqrt(values["years_left"] + problem.dt_years)
    values.update(zip(HATS, _tents(values["moneyness"] / scale, HAT_KNOTS)))
    for j, name in enumerate(factor_names):
        values[name] = np.asarray(obs[:, 3 + j], dtype=float)
    return StateFeatures(values, decoded.spot, decoded.holding_shares)


def hedge_move(problem: HedgingProblem, points: int = 41) -> float:
    """The problem's natural unit of holdings: the typical one-step change of the hedge, per
    share of notional, ``|book gamma| S vol sqrt(dt) / notional`` averaged over spots within one
    horizon standard deviation of the reference spot at the start (floored at 1e-4).

    Exploration spreads and candidate band widths are multiples of it, so the same settings suit
    a single option and a spread whose net gamma is small.
    """
    marks = problem.marks
    width = marks.volatility * np.sqrt(problem.horizon_years)
    spots = problem.reference_spot * np.exp(np.linspace(-width, width, points))
    gamma = np.abs(problem.book.gamma(spots, 0.0, marks)) * spots / problem.notional_shares
    return max(float(gamma.mean()) * marks.volatility * np.sqrt(problem.dt_years), 1e-4)


def _tents(x: np.ndarray, knots: np.ndarray) -> list[np.ndarray]:
    """Piecewise-linear tent functions on ``knots`` (a partition of unity; clamped at the ends)."""
    x = np.clip(x, knots[0], knots[-1])
    position = np.interp(x, knots, np.arange(len(knots), dtype=float))
    return [np.maximum(0.0, 1.0 - np.abs(position - i)) for i in range(len(knots))]


def _raw(name: str, state: StateFeatures, targets: np.ndarray) -> np.ndarray:
    if name == "1":
        return np.ones_like(targets)
    if name == "target":
        return targets
    if name == "abs_target":
        return np.abs(targets)
    if name == "gap":
        return targets - state.hedge[:, None]
    if name == "abs_gap":
        return np.abs(targets - state.hedge[:, None])
    if name == "trade":
        return targets - state.holding[:, None]
    if name == "abs_trade":
        return np.abs(targets - state.holding[:, None])
    if name in state.values:
        return np.broadcast_to(state.values[name][:, None], targets.shape)
    raise ValueError(f"unknown feature {name!r}; known: {', '.join(FEATURES)} and market factors")


def _factor(factor: str, state: StateFeatures, targets: np.ndarray, cache: dict) -> np.ndarray:
    """A feature or its power (``"gap^3"``), cached; powers by repeated multiplication (fast)."""
    if factor not in cache:
        name, _, power = factor.partition("^")
        if not power or int(power) == 1:
            cache[factor] = _raw(name, state, targets)
        else:
            n = int(power)
            cache[factor] = _factor(f"{name}^{n - 1}" if n > 2 else name, state, targets, cache) * _factor(
                name, state, targets, cache)
    return cache[factor]


def _term(term: str, state: StateFeatures, targets: np.ndarray, cache: dict, out: np.ndarray) -> np.ndarray:
    factors = term.split("*")
    np.copyto(out, _factor(factors[0], state, targets, cache))
    for factor in factors[1:]:
        out *= _factor(factor, state, targets, cache)
    return out


def basis_columns(terms: tuple[str, ...], state: StateFeatures, targets: np.ndarray) -> np.ndarray:
    """Design array term-major, shape (len(terms), n, C), for candidate ``targets`` of shape (n, C)."""
    targets = np.asarray(targets, dtype=float)
    cache: dict[str, np.ndarray] = {}
    out = np.empty((len(terms),) + targets.shape)
    for j, term in enumerate(terms):
        _term(term, state, targets, cache, out[j])
    return out


def basis(terms: tuple[str, ...], state: StateFeatures, targets: np.ndarray) -> np.ndarray:
    """Design array of shape (n, C, len(terms)) for candidate ``targets`` of shape (n, C)."""
    return np.moveaxis(basis_columns(terms, state, targets), 0, -1)


def combination(terms: tuple[str, ...], coef: np.ndarray, state: StateFeatures, targets: np.ndarray) -> np.ndarray:
    """``basis(...) @ coef`` without building the design array: shape (n, C).

    A term is a product of target factors (``TARGET_FACTORS``) and state
    factors. Terms with the same target part are grouped: their weighted state
    parts add up to one coefficient per row, worked out on (n,) arrays, so the
    (n, C) work is one pass per distinct target part, and powers of one target
    factor (``gap``, ``gap^2``, ...) are summed by Horner's rule. Equal to the
    term-by-term sum up to rounding.
    """
    targets = np.asarray(targets, dtype=float)
    groups: dict[tuple, np.ndarray | float] = {}
    state_cache: dict[str, np.ndarray] = {}
    for term, weight in zip(terms, coef):
        if not weight:
            continue
        target_part, state_part = _split_term(term)
        row: np.ndarray | float = float(weight)
        for factor in state_part:
            row = row * _state_factor(factor, state, state_cache)
        groups[target_part] = groups.get(target_part, 0.0) + row
    polynomials: dict[str, dict[int, np.ndarray | float]] = {}
    total = np.zeros(targets.shape)
    cache: dict[str, np.ndarray] = {}
    for target_part, row in groups.items():
        if len(target_part) == 1:
            name, power = target_part[0]
            polynomials.setdefault(name, {})[power] = row
            continue
        # A product of several target factors, or none (a term of the state alone).
        value = np.ones(targets.shape) if not target_part else _factor(_power_name(*target_part[0]), state,
                                                                        targets, cache).copy()
        for name, power in target_part[1:]:
            value *= _factor(_power_name(name, power), state, targets, cache)
        value *= _column(row)
        total += value
    for name, powers in polynomials.items():
        x = _factor(name, state, targets, cache)
        top = max(powers)
        value = x * _column(powers[top])
        for power in range(top - 1, 0, -1):
            if power in powers:
                value += _column(powers[power])
            value *= x
        total += value
    return total


# Factors that depend on the candidate target (the rest depend on the state alone).
TARGET_FACTORS = frozenset({"target", "abs_target", "gap", "abs_gap", "trade", "abs_trade"})


@functools.lru_cache(maxsize=1024)
def _split_term(term: str) -> tuple[tuple[tuple[str, int], ...], tuple[str, ...]]:
    """``"gap^2*moneyness*gap"`` -> (((gap, 3),), ("moneyness",)): target factors with their total
    powers, sorted, and the state factors as written."""
    powers: dict[str, int] = {}
    state_part = []
    for factor in term.split("*"):
        name, _, power = factor.partition("^")
        if name in TARGET_FACTORS:
            powers[name] = powers.get(name, 0) + (int(power) if power else 1)
        else:
            state_part.append(factor)
    return tuple(sorted(powers.items())), tuple(state_part)


def target_part(term: str) -> tuple[tuple[str, int], ...]:
    """The target factors of a term with their powers; empty for a term of the state alone."""
    return _split_term(term)[0]


def _power_name(name: str, power: int) -> str:
    return name if power == 1 else f"{name}^{power}"


def _state_factor(factor: str, state: StateFeatures, cache: dict) -> np.ndarray | float:
    """A state feature or its power, per row (n,)."""
    if factor not in cache:
        name, _, power = factor.partition("^")
        if name == "1":
            cache[factor] = 1.0
        elif name not in state.values:
            raise ValueError(f"unknown feature {name!r}; known: {', '.join(FEATURES)} and market factors")
        else:
            cache[factor] = state.values[name] ** (int(power) if power else 1)
    return cache[factor]


def _column(row: np.ndarray | float) -> np.ndarray | float:
    """A per-row coefficient as a column that broadcasts over candidates."""
    return row[:, None] if isinstance(row, np.ndarray) else row


def check_terms(terms, factor_names: tuple[str, ...] = ()) -> tuple[str, ...]:
    """Validate basis term names early, with a message that lists the known names."""
    known = set(FEATURES) | {"1", "abs_target"} | set(factor_names)
    for term in terms:
        for factor in term.split("*"):
            name, _, power = factor.partition("^")
            if name not in known or (power and not power.isdigit()):
                raise ValueError(f"basis term {term!r}: unknown feature {name!r} (known: {', '.join(sorted(known))})")
    return tuple(terms)
