"""The market and the hedging problem: pricing, book, paths, frictions, the step, envs and rollouts.

Importing this package registers the Gymnasium id ``rehedge/Hedging-v0``
(with a natively vectorized ``vector_entry_point``).
"""

import gymnasium

__version__ = "0.1.0"

ENV_ID = "rehedge/Hedging-v0"

if ENV_ID not in gymnasium.registry:
    gymnasium.register(
        id=ENV_ID,
        entry_point="hedge_env.env:HedgingEnv",
        vector_entry_point="hedge_env.env:HedgingVectorEnv",
    )
