"""Checks of configuration values, shared by the ``__post_init__`` of every config section.

Each check raises :class:`~pmap.errors.ConfigError` with a message that names the key
(``section.key``), says what is required and shows the value, e.g.
``rates.yield_goal must be >= 0, got -5``.  NaN fails every bound.  Only numpy and
:mod:`pmap.errors` are imported, so the numerics may use this module.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable

import numpy as np

from pmap.errors import ConfigError

__all__ = ["require", "check_number", "check_whole", "check_choice"]


def require(ok: bool, key: str, requirement: str, value: object) -> None:
    """Raise ``ConfigError("<key> must <requirement>, got <value>")`` unless ``ok``.

    For requirements the other checks do not express, e.g.
    ``require(hi > lo, "rates.max_rate_kg_ha", f"exceed rates.min_rate_kg_ha ({lo})", hi)``.
    """
    if not ok:
        raise ConfigError(f"{key} must {requirement}, got {value}")


def check_number(
    key: str,
    value: object,
    *,
    ge: float | None = None,
    gt: float | None = None,
    le: float | None = None,
    lt: float | None = None,
    finite: bool = False,
) -> None:
    """Require a real number within bounds (and finite, if asked).

    Parameters
    ----------
    key : str
        ``section.key``, for the message.
    value : object
        The value to check; anything but a real number fails.
    ge, gt, le, lt : float, optional
        Bounds: value >= ge, > gt, <= le, < lt.  Give at most one lower and one upper.
    finite : bool
        Also reject +-inf.

    Raises
    ------
    pmap.errors.ConfigError
        ``<key> must be >= 0, got -1``; ``... must be > 0, ...``; with two bounds
        ``... must lie in [0, 1], ...`` (brackets closed, parentheses open); with no bound
        ``... must be finite, ...``.
    """
    if ge is not None and gt is not None or le is not None and lt is not None:
        raise ValueError("check_number takes at most one lower and one upper bound")
    ok = isinstance(value, numbers.Real) and not math.isnan(value)
    if ok:
        number = float(value)  # type: ignore[arg-type]
        ok = (
            (ge is None or number >= ge)
            and (gt is None or number > gt)
            and (le is None or number <= le)
            and (lt is None or number < lt)
            and (not finite or math.isfinite(number))
        )
    require(ok, key, _requirement(ge, gt, le, lt), value)


def check_whole(key: str, value: object, *, ge: int) -> None:
    """Require an integer (not a bool, not a float) of at least ``ge``.

    Raises
    ------
    pmap.errors.ConfigError
        ``<key> must be a whole number >= <ge>, got <value>``.
    """
    is_int = isinstance(value, (int, np.integer)) and not isinstance(value, bool)
    require(is_int and value >= ge, key, f"be a whole number >= {ge}", value)  # type: ignore[operator]


def check_choice(key: str, value: object, choices: Iterable[str]) -> None:
    """Require one of ``choices``.

    Raises
    ------
    pmap.errors.ConfigError
        ``<key> must be one of a, b, c, got 'x'``.
    """
    names = tuple(choices)
    if value not in names:
        raise ConfigError(f"{key} must be one of {', '.join(names)}, got {value!r}")


def _requirement(ge: float | None, gt: float | None, le: float | None, lt: float | None) -> str:
    lower = f"[{ge:g}" if ge is not None else f"({gt:g}" if gt is not None else None
    upper = f"{le:g}]" if le is not None else f"{lt:g})" if lt is not None else None
    if lower is not None and upper is not None:
        return f"lie in {lower}, {upper}"
    if lower is not None:
        return f"be {'>=' if ge is not None else '>'} {lower[1:]}"
    if upper is not None:
        return f"be {'<=' if le is not None else '<'} {upper[:-1]}"
    return "be finite"
