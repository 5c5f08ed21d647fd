"""The small TOML scenarios the tests share: a short-dated at-the-money call under GBM, hedged
daily, in the sizes each group of tests needs. :func:`small_gbm` builds one; the named ones are
what the CLI, report, sweep, interrupt and hedge-table tests run."""

from __future__ import annotations

import tomli_w


def small_gbm(name: str, seed: int, days: int, *, train: int, heldout: int, chunk: int, quantity: int = -1,
              multiplier: int | None = None, cost_rate: float = 0.001, risk_aversion: float = 1.0,
              baselines: tuple = (), agents: tuple = (), **sections) -> str:
    """TOML of a GBM scenario (spot 100, volatility 20%): short ``quantity`` ATM calls expiring at
    the horizon of ``days`` daily rehedges; ``sections`` are more tables (report, export, sweep)."""
    option = {"kind": "call", "strike": 100.0, "expiry_days": days, "quantity": quantity}
    if multiplier is not None:
        option["multiplier"] = multiplier
    config = {
        "name": name,
        "seed": seed,
        "market": {"model": "gbm", "spot": 100.0, "volatility": 0.2},
        "book": {"options": [option]},
        "schedule": {"steps": days},
        "frictions": {"cost_rate": cost_rate},
        "objective": {"risk_aversion": risk_aversion},
        "data": {"train_paths": train, "heldout_paths": heldout, "chunk_paths": chunk},
        "baselines": [dict(b) for b in baselines],
        **({"agents": [dict(a) for a in agents]} if agents else {}),
        **sections,
    }
    return tomli_w.dumps(config)


DELTA = {"kind": "delta"}
TUNED_FIXED_BAND = {"kind": "fixed_band", "half_width": "tune"}
TUNED_WHALLEY_WILMOTT = {"kind": "whalley_wilmott", "risk_aversion": "tune"}
LINEAR = {"kind": "linear"}


def every_agent(trees: int, grid_points: int, **grid) -> tuple:
    """The linear, fitted-Q (``trees`` boosting iterations) and grid-DP agents, small."""
    return (LINEAR, {"kind": "fitted_q", "regressor": "hist_gradient_boosting", "regressor_params": {"max_iter": trees}},
            {"kind": "grid_dp", "spot_points": grid_points, "holding_points": grid_points, **grid})


# Every agent kind on 10 days: the command-line and interrupt tests.
SMALL = small_gbm("small-test", 3, 10, train=600, heldout=1500, chunk=500,
                  baselines=(DELTA, TUNED_FIXED_BAND), agents=every_agent(10, 41))

# Every agent kind and a two-cell cost sweep on 8 days: the report tests. Eight policies, as many as
# the demo's, so the figures' legends are as long as a desk's.
TINY = small_gbm("report-test", 5, 8, train=400, heldout=800, chunk=400,
                 baselines=({"kind": "no_hedge"}, DELTA, {"kind": "leland"}, TUNED_WHALLEY_WILMOTT,
                            {"kind": "fixed_band", "half_width": 0.05}),
                 agents=every_agent(5, 21, quadrature_nodes=4),
                 report={"bootstrap_samples": 200}, sweep={"frictions.cost_rate": [0.001, 0.005]})


def sweep_scenario(seeds: bool = True) -> str:
    """Two costs (and two seeds unless ``seeds`` is False): the sweep tests' cells."""
    sweep = {"frictions.cost_rate": [0.001, 0.004], **({"seed": [1, 2]} if seeds else {})}
    return small_gbm("tiny-sweep", 3, 10, train=600, heldout=1500, chunk=250,
                     baselines=(DELTA, TUNED_FIXED_BAND), agents=(LINEAR,),
                     report={"bootstrap_samples": 200}, sweep=sweep)


# Two contracts of 50 shares and an exported tuned band: the hedge-table command tests.
TABLE = small_gbm("table-test", 5, 8, train=400, heldout=1000, chunk=500, quantity=-2, multiplier=50,
                  cost_rate=0.002, risk_aversion=0.01, baselines=(DELTA, TUNED_WHALLEY_WILMOTT),
                  export={"policy": "whalley_wilmott", "moneyness_points": 61, "holding_points": 21,
                          "currency": "EUR"})
