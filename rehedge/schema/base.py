"""Small validation helpers and the base of every section: the rules' wording, the plausible ranges of
the numeric keys and the checks fields share."""

from __future__ import annotations

import inspect
import math
import re
from typing import Annotated, Any

from pydantic import AfterValidator, BaseModel, BeforeValidator, ConfigDict
from pydantic_core import PydanticCustomError


# ---------------------------------------------------------------------------
# Small validation helpers
# ---------------------------------------------------------------------------

_NAME_RE = re.compile(r"[A-Za-z0-9_.-]+")
# A name is part of folder and file names (NAME-TIMESTAMP-2.partial, agents/NAME.joblib, a sweep
# cell's NAME-key-value...), and a file name may have 255 bytes: 64 leaves room for the rest.
MAX_NAME_CHARS = 64

# Plausible ranges of the numeric keys (docs/config-ranges.md lists every key's, with the reasons).
# A value outside one is far from any market or book a desk hedges, and past it the numbers lose
# their meaning (overflow, a grid that cannot fit in memory) before they lose their finiteness.
SPOT_RANGE = (1e-4, 1e9)  # currency per share: a dear share in a currency of small units is below 1e9
VOLATILITY_RANGE = (1e-4, 5.0)  # annual: 500%, the history loader's bound on implied volatilities too
VARIANCE_MAX = 25.0  # a variance of 25 is a volatility of 500%
RATE_RANGE = (-0.2, 2.0)  # annual: policy rates have gone from -0.75% to above 100%
EXPIRY_DAYS_MAX = 3660.0  # ten years of calendar days
QUANTITY_MAX = 1e7  # contracts in one position
SHARES_MAX = 1e12  # shares: more than any company has issued
MONEY_MAX = 1e9  # currency, a fixed cost per trade: beyond any ticket charge
RISK_AVERSION_MAX = 1e6  # per currency unit: a million times a desk's usual 1 per currency unit
HALF_WIDTH_MAX = 10.0  # a band half-width, in shares per share of notional
STEPS_MAX = 20_000  # rehedges in one horizon (ten years of hourly rehedges is about 20,000)
PATHS_MAX = 50_000_000  # paths in one set: the memory estimate refuses far fewer on most machines
SEED_MAX = 2**63 - 1  # the largest integer TOML holds
ROWS_MAX = 100_000  # trading days: four centuries of rows
GRID_POINTS_MAX = 2001  # per axis of a grid optimum: its error is far below the noise at a few hundred
TABLE_POINTS_MAX = 10_001  # per axis of an exported hedge table (its rows are capped too: rehedge/budget.py)


def _rule(rule: str, *path: str | int) -> PydanticCustomError:
    """A validation error with a short rule; ``path`` is appended to the error location."""
    return PydanticCustomError("config_rule", "{rule}", {"rule": rule, "path": tuple(path)})


def _num(value: Any) -> Any:
    """Integer-valued floats as ints, for bounds and converted values (0.0 -> 0)."""
    if isinstance(value, float) and value.is_integer():
        return int(value)
    return value


def _show(value: Any) -> str:
    """Render an offending value briefly, in TOML terms where it matters."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list) and len(repr(value)) > 60:
        return f"an array of {len(value)} items"
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return text


def _check_name(value: str) -> str:
    if not _NAME_RE.fullmatch(value) or set(value) == {"."}:
        raise _rule(
            "must use only letters, digits, '_', '.', '-' (it names run folders), "
            f"got {_show(value)}"
        )
    if len(value) > MAX_NAME_CHARS:
        raise _rule(f"must be at most {MAX_NAME_CHARS} characters (it names folders and files), got "
                    f"{len(value)}: {_show(value[:24])}...")
    return value


def _check_nonzero(value: float) -> float:
    if value == 0:
        raise _rule(f"must be non-zero (+ long, - short), got {_show(_num(value))}")
    return value


def _check_open_unit(value: float) -> float:
    if not 0 < value < 1:
        raise _rule(f"must be in (0, 1), got {_show(_num(value))}")
    return value


def _check_closed_unit(value: float) -> float:
    if not 0 <= value <= 1:
        raise _rule(f"must be in [0, 1], got {_show(_num(value))}")
    return value


def _open_unit_or_none(value: float | None) -> float | None:
    return value if value is None else _check_open_unit(value)


_check_open_unit.range = _open_unit_or_none.range = ("> 0", "< 1")  # read by rehedge.config_ranges
_check_closed_unit.range = (">= 0", "<= 1")


# Below this a vol of vol is numerically no different from 0, and the QE scheme's rho / xi terms
# (the variance's shock recovered from its step, times 1 / xi) lose the spot's correlated shock to
# rounding, then overflow: 0 is the deterministic variance, exact.
VOL_OF_VOL_MIN = 1e-6  # a vol of vol below it is 0 to rounding, and the simulation overflows; 0 itself is exact


def _check_vol_of_vol(value: float) -> float:
    if 0 < value < VOL_OF_VOL_MIN:
        raise _rule(f"must be 0 (a deterministic variance) or >= {VOL_OF_VOL_MIN:g}, got {_show(_num(value))}")
    return value


_check_vol_of_vol.range = (f"not in (0, {VOL_OF_VOL_MIN:g})",)


def _inf_means_no_limit(value: Any) -> Any:
    if isinstance(value, float) and value == math.inf:
        return None
    return value


def _tunable(strictly_positive: bool, high: float):
    """Validator for 'a number (> 0 or >= 0, at most ``high``) or the string "tune"'."""
    bound = "> 0" if strictly_positive else ">= 0"

    def check(value: Any) -> Any:
        if value == "tune" and isinstance(value, str):
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise _rule(f"must be a number {bound} or 'tune', got {_show(value)}")
        if not math.isfinite(value):
            raise _rule(f"must be a finite number {bound} or 'tune', got {_show(value)}")
        if value < 0 or (strictly_positive and value == 0):
            raise _rule(f"must be {bound} or 'tune', got {_show(value)}")
        if value > high:
            raise _rule(f"must be <= {_show(_num(high))} or 'tune', got {_show(value)}")
        return float(value)

    check.range = (bound, f"<= {high:g}", "or 'tune'")  # read by rehedge.config_ranges
    return BeforeValidator(check)


PolicyName = Annotated[str, AfterValidator(_check_name)]


def default_of(cls, parameter: str):
    """The default of ``cls``'s constructor parameter: a schema field that fills that parameter takes
    its default from the class, so the two cannot drift apart."""
    return inspect.signature(cls).parameters[parameter].default


class _Spec(BaseModel):
    """Base for every config table: unknown keys are errors, types are strict
    (``true`` is not a number, ``30.0`` is not an integer), NaN/inf are rejected."""

    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False)
