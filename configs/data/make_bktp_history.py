"""Write bktp-history.csv: an INVENTED daily price history of Brackwater Tidal Power (BKTP).

Demo data only, no real prices. Run once (``python configs/data/make_bktp_history.py``); the
CSV is committed and read by configs/historical.toml. The model: business days 2016-2024,
a log price with 6% annual drift and a stochastic variance (mean-reverting square root,
long-run volatility 24%, variance shocks correlated -0.6 with the price), and an implied
volatility column that is the model's volatility plus a premium of about two vol points
and some noise, in decimal units. Seeded, so it writes the same file every time.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

SEED = 7
DAYS_PER_YEAR = 252


def main() -> None:
    rng = np.random.default_rng(SEED)
    dates = pd.bdate_range("2016-01-04", "2024-12-31")
    n = len(dates)
    dt = 1.0 / DAYS_PER_YEAR
    kappa, theta, xi, rho = 3.0, 0.24**2, 0.35, -0.6
    variance = np.empty(n)
    log_price = np.empty(n)
    variance[0], log_price[0] = theta, np.log(31.20)
    shocks = rng.standard_normal((n, 2))
    for t in range(1, n):
        v = max(variance[t - 1], 0.0)
        z_price = shocks[t, 0]
        z_var = rho * z_price + np.sqrt(1 - rho**2) * shocks[t, 1]
        log_price[t] = log_price[t - 1] + (0.06 - 0.5 * v) * dt + np.sqrt(v * dt) * z_price
        variance[t] = v + kappa * (theta - v) * dt + xi * np.sqrt(v * dt) * z_var
    volatility = np.sqrt(np.maximum(variance, 1e-4))
    implied = volatility + 0.02 + 0.01 * rng.standard_normal(n)
    implied = np.clip(implied, 0.08, None)
    table = pd.DataFrame({"date": dates.strftime("%Y-%m-%d"), "close": np.round(np.exp(log_price), 2),
                          "implied_vol": np.round(implied, 4)})
    out = Path(__file__).with_name("bktp-history.csv")
    table.to_csv(out, index=False)
    print(f"{out}: {n} rows, {table['date'].iloc[0]} .. {table['date'].iloc[-1]}, "
          f"close {table['close'].min():.2f} .. {table['close'].max():.2f}")


if __name__ == "__main__":
    main()
