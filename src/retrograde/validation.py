"""Parameter checks shared by every plug-in, so every error reads the same way:

``<kind> '<name>': parameter <key>=<value!r> is invalid; allowed: <what is allowed>``
"""

from __future__ import annotations

import difflib
import numbers
from collections.abc import Iterable, Sequence
from typing import Any

from .errors import ConfigError

__all__ = ["check_choice", "check_float", "check_int", "did_you_mean", "invalid"]


def invalid(owner: str, key: str, value: Any, allowed: str) -> ConfigError:
    return ConfigError(f"{owner}: parameter {key}={value!r} is invalid; allowed: {allowed}")


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """Return ``" (did you mean 'x'?)"`` for the closest choice, or ``""``."""
    close = difflib.get_close_matches(str(word), list(choices), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _range_text(
    kind: str, low: float | None, high: float | None, low_open: bool, high_open: bool
) -> str:
    parts = []
    if low is not None:
        parts.append(f"{'>' if low_open else '>='} {low}")
    if high is not None:
        parts.append(f"{'<' if high_open else '<='} {high}")
    return f"{kind} " + " and ".join(parts) if parts else kind


def check_int(
    owner: str, key: str, value: Any, low: int | None = None, high: int | None = None
) -> int:
    """An integer (bools refused) with ``low <= value <= high``."""
    ok = isinstance(value, numbers.Integral) and not isinstance(value, bool)
    if ok and (low is None or value >= low) and (high is None or value <= high):
        return int(value)
    raise invalid(owner, key, value, _range_text("an integer", low, high, False, False))


def check_float(
    owner: str,
    key: str,
    value: Any,
    low: float | None = None,
    high: float | None = None,
    *,
    low_open: bool = False,
    high_open: bool = False,
) -> float:
    """A real number in the given (optionally open) interval."""
    ok = isinstance(value, numbers.Real) and not isinstance(value, bool)
    if ok:
        x = float(value)
        above = low is None or (x > low if low_open else x >= low)
        below = high is None or (x < high if high_open else x <= high)
        if above and below and x == x:
            return x
    raise invalid(owner, key, value, _range_text("a number", low, high, low_open, high_open))


def check_choice(owner: str, key: str, value: Any, choices: Sequence[str]) -> str:
    if value in choices:
        return str(value)
    allowed = ", ".join(repr(c) for c in choices)
    raise ConfigError(
        f"{owner}: parameter {key}={value!r} is invalid; allowed: one of {allowed}"
        + did_you_mean(str(value), choices)
    )
