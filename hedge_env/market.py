"""Market path generators.

A generator produces exogenous spot paths (the prices the market would show
if the hedger never traded) plus optional named factor arrays of the same
shape, for example a stochastic variance. Paths are float64 arrays of shape
``(n_paths, n_steps + 1)``; column 0 is the starting spot.

Simulated generators draw paths in fixed blocks of ``BLOCK_PATHS`` paths,
block ``b`` from its own child of the seed (``SeedSequence(seed,
spawn_key=(b,))``). So path ``i`` is the same whatever chunk size a caller
asks for, and the same config and seed give the same paths bit for bit.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np

BLOCK_PATHS = 4096


@dataclass(frozen=True)
class MarketPaths:
    """Spot paths and named factor paths, all of shape (n_paths, n_steps + 1).

    Parameters
    ----------
    spot : ndarray
        Exogenous spot prices, currency per share.
    factors : dict of str to ndarray
        Extra state of the market model (for example ``"variance"``), same shape.
    """

    spot: np.ndarray
    factors: dict[str, np.ndarray] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.spot.ndim != 2:
            raise ValueError(f"spot paths must be 2-D (n_paths, n_steps + 1), got shape {self.spot.shape}")
        for name, values in self.factors.items():
            if values.shape != self.spot.shape:
                raise ValueError(
                    f"factor {name!r} has shape {values.shape}, expected {self.spot.shape} like the spot paths"
                )

    @property
    def n_paths(self) -> int:
        return self.spot.shape[0]

    @property
    def n_steps(self) -> int:
        return self.spot.shape[1] - 1

    def rows(self, start: int, stop: int) -> MarketPaths:
        """Paths ``start`` to ``stop`` (views, no copy)."""
        return MarketPaths(self.spot[start:stop], {k: v[start:stop] for k, v in self.factors.items()})


class PathGenerator(ABC):
    """Interface of every market model.

    Subclasses set ``factor_names`` (factors they produce) and
    ``observed_factors`` (the subset a hedger may see in its observation).
    """

    factor_names: tuple[str, ...] = ()
    observed_factors: tuple[str, ...] = ()

    @abstractmethod
    def generate(self, n_paths: int, n_steps: int, dt_years: float, seed: int, start: int = 0) -> MarketPaths:
        """Paths number ``start`` to ``start + n_paths`` of the stream named by ``seed``."""

    def iter_chunks(
        self, n_paths: int, n_steps: int, dt_years: float, seed: int, chunk_paths: int
    ) -> Iterator[MarketPaths]:
        """The same paths as ``generate(n_paths, ...)``, ``chunk_paths`` at a time."""
        if chunk_paths < 1:
            raise ValueError(f"chunk_paths must be >= 1, got {chunk_paths}")
        for start in range(0, n_paths, chunk_paths):
            yield self.generate(min(chunk_paths, n_paths - start), n_steps, dt_years, seed, start)


class SimulatedMarket(PathGenerator):
    """A model simulated block by block; subclasses implement ``_simulate``."""

    spot: float

    @abstractmethod
    def _simulate(self, rng: np.random.Generator, n_paths: int, n_steps: int, dt_years: float) -> MarketPaths:
        """Simulate ``n_paths`` paths from ``self.spot`` with the given generator."""

    def _block(self, block: int, n_steps: int, dt_years: float, seed: int) -> MarketPaths:
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(block,)))
        return self._simulate(rng, BLOCK_PATHS, n_steps, dt_years)

    def generate(self, n_paths: int, n_steps: int, dt_years: float, seed: int, start: int = 0) -> MarketPaths:
        if n_paths < 1 or n_steps < 1 or start < 0:
            raise ValueError(f"need n_paths >= 1, n_steps >= 1, start >= 0; got {n_paths}, {n_steps}, {start}")
        stop = start + n_paths
        first, last = start // BLOCK_PATHS, (stop - 1) // BLOCK_PATHS
        blocks = [self._block(b, n_steps, dt_years, seed) for b in range(first, last + 1)]
        offset = start - first * BLOCK_PATHS
        spot = np.concatenate([b.spot for b in blocks])[offset : offset + n_paths]
        factors = {
            name: np.concatenate([b.factors[name] for b in blocks])[offset : offset + n_paths]
            for name in self.factor_names
        }
        # Copies, so a caller holding one chunk does not pin the whole block set.
        return MarketPaths(np.ascontiguousarray(spot), {k: np.ascontiguousarray(v) for k, v in factors.items()})


@dataclass(frozen=True)
class GBMMarket(SimulatedMarket):
    """Geometric Brownian motion: dS = drift S dt + volatility S dW.

    Parameters
    ----------
    spot : float
        Starting spot, currency per share.
    drift : float
        Annual drift of the price (real-world, includes any dividend effect).
    volatility : float
        Annual volatility, decimal.
    """

    spot: float = 100.0
    drift: float = 0.0
    volatility: float = 0.2

    def _simulate(self, rng: np.random.Generator, n_paths: int, n_steps: int, dt_years: float) -> MarketPaths:
        shocks = rng.standard_normal((n_paths, n_steps))
        log_steps = (self.drift - 0.5 * self.volatility**2) * dt_years + self.volatility * np.sqrt(dt_years) * shocks
        log_spot = np.empty((n_paths, n_steps + 1))
        log_spot[:, 0] = np.log(self.spot)
        np.cumsum(log_steps, axis=1, out=log_spot[:, 1:])
        log_spot[:, 1:] += log_spot[:, :1]
        spot = np.exp(log_spot)
        spot[:, 0] = self.spot  # exactly the starting spot, not exp(log(spot)) one rounding away
        return MarketPaths(spot)


@dataclass(frozen=True)
class GivenPaths(PathGenerator):
    """Paths supplied as arrays (historical windows, or a test's own paths).

    ``seed`` is ignored: the paths are what they are. Asking for more paths
    than were given is an error.
    """

    paths: MarketPaths
    observed_factors: tuple[str, ...] = ()

    @property
    def factor_names(self) -> tuple[str, ...]:  # type: ignore[override]
        return tuple(self.paths.factors)

    def generate(self, n_paths: int, n_steps: int, dt_years: float, seed: int, start: int = 0) -> MarketPaths:
        if n_steps != self.paths.n_steps:
            raise ValueError(f"given paths have {self.paths.n_steps} steps, asked for {n_steps}")
        if start + n_paths > self.paths.n_paths:
            raise ValueError(f"asked for paths {start}..{start + n_paths}, only {self.paths.n_paths} given")
        return self.paths.rows(start, start + n_paths)


@dataclass(frozen=True)
class PathSet(PathGenerator):
    """``n_paths`` paths of ``market`` under one ``seed``, drawn a chunk at a time when asked for.

    It stands for ``market.generate(n_paths, n_steps, dt_years, seed)`` without
    holding it: a rollout (``rollout(problem, policy, path_set, path_set.n_paths)``)
    or :meth:`rows` draws only the paths it needs. The ``seed`` argument of
    :meth:`generate` is ignored, as for :class:`GivenPaths`.
    """

    market: PathGenerator
    n_paths: int
    n_steps: int
    dt_years: float
    seed: int

    @property
    def factor_names(self) -> tuple[str, ...]:  # type: ignore[override]
        return self.market.factor_names

    @property
    def observed_factors(self) -> tuple[str, ...]:  # type: ignore[override]
        return self.market.observed_factors

    def generate(self, n_paths: int, n_steps: int, dt_years: float, seed: int, start: int = 0) -> MarketPaths:
        if n_steps != self.n_steps or start + n_paths > self.n_paths:
            raise ValueError(f"asked for paths {start}..{start + n_paths} x {n_steps} steps of a set of "
                             f"{self.n_paths} x {self.n_steps}")
        return self.market.generate(n_paths, n_steps, self.dt_years, self.seed, start)

    def rows(self, start: int, stop: int) -> MarketPaths:
        """Paths ``start`` to ``stop``."""
        return self.generate(stop - start, self.n_steps, self.dt_years, self.seed, start)
