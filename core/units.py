"""Step counts in words a modeller reads at a glance, and in the chain's own time unit.

>>> from core.model import Step
>>> format_steps(1e12, Step(1, "day"))
'1.00e12 steps (~2.74 billion years at 1 day per step)'
>>> format_steps(40, None)
'40 steps'
"""
from __future__ import annotations

import math
from typing import Any

__all__ = ["format_count", "format_steps", "format_duration", "format_tv", "step_seconds", "unit_seconds",
           "TV_ROUNDING"]

_DAY = 86400.0
_YEAR = 365.25 * _DAY  # Julian year
_UNITS = {
    "millisecond": 1e-3, "ms": 1e-3,
    "second": 1.0, "sec": 1.0, "s": 1.0,
    "minute": 60.0, "min": 60.0,
    "hour": 3600.0, "hr": 3600.0, "h": 3600.0,
    "day": _DAY, "d": _DAY,
    "week": 7 * _DAY, "wk": 7 * _DAY,
    "month": _YEAR / 12, "mo": _YEAR / 12,
    "quarter": _YEAR / 4,
    "year": _YEAR, "yr": _YEAR, "y": _YEAR,
}
_LARGE = ((1e12, "trillion"), (1e9, "billion"), (1e6, "million"), (1e3, "thousand"))


def unit_seconds(unit: str) -> float | None:
    """Seconds in one ``unit`` (``"day"``, ``"days"``, ``"h"``...), None if not a time unit."""
    u = unit.strip().lower()
    if u in _UNITS:
        return _UNITS[u]
    if u.endswith("s") and u[:-1] in _UNITS:
        return _UNITS[u[:-1]]
    return None


def step_seconds(step: Any) -> float | None:
    """Seconds per step of a :class:`core.model.Step`, None when unknown."""
    if step is None:
        return None
    s = unit_seconds(str(step.unit))
    if s is None:
        return None
    v = float(step.value)
    return v * s if math.isfinite(v) and v > 0 else None


#: An exact total variation distance below this is rounding: double precision carries laws to an
#: absolute 1e-16 or so per state, so the distance of two laws that agree has that size, not 0.
TV_ROUNDING = 1e-12


def format_tv(x: float, *, zero: str = "< 1e-12", digits: int = 3) -> str:
    """An exact total variation distance (or a difference of exact laws), ``zero`` below :data:`TV_ROUNDING`.

    >>> format_tv(0.01234), format_tv(3.6e-17), format_tv(0.0, zero="≈ 0"), format_tv(0.01234, digits=2)
    ('0.0123', '< 1e-12', '≈ 0', '0.012')
    """
    x = float(x)
    return zero if abs(x) < TV_ROUNDING else f"{x:.{digits}g}"


def _sig(x: float, digits: int = 3) -> str:
    """``x`` with ``digits`` significant digits, plain notation below 1e6."""
    if x == 0:
        return "0"
    if abs(x) >= 1e6 or abs(x) < 1e-3:
        m, e = f"{x:.{digits - 1}e}".split("e")
        return f"{m}e{int(e)}"
    s = f"{x:.{digits}g}"
    if "e" in s:  # e.g. 1e+03 from .3g of 999.9
        s = f"{x:.0f}"
    return s


def format_count(x: float) -> str:
    """A step count: ``"12,345"`` for whole numbers below a million, else 3 significant digits."""
    x = float(x)
    if math.isnan(x):
        return "undefined"
    if math.isinf(x):
        return "infinitely many"
    if x.is_integer() and abs(x) < 1e6:
        return f"{int(x):,}"
    return _sig(x)


def _q(x: float, unit: str) -> str:
    text = _sig(x)
    return f"{text} {unit}" if text == "1" else f"{text} {unit}s"


def format_duration(seconds: float) -> str:
    """A duration in the largest natural unit: ``"3.5 hours"``, ``"2.74 billion years"``."""
    s = float(seconds)
    if math.isinf(s):
        return "forever"
    if s < 60:
        return _q(s, "second")
    if s < 3600:
        return _q(s / 60, "minute")
    if s < _DAY:
        return _q(s / 3600, "hour")
    if s < 14 * _DAY:
        return _q(s / _DAY, "day")
    if s < 8 * 7 * _DAY:
        return _q(s / (7 * _DAY), "week")
    if s < 2 * _YEAR:
        return _q(s / (_YEAR / 12), "month")
    y = s / _YEAR
    if y >= 1e15:
        return _q(y, "year")
    for scale, word in _LARGE:
        if y >= scale:
            return f"{_sig(y / scale)} {word} years"
    return _q(y, "year")


_ABBREVIATIONS = {"ms", "s", "sec", "min", "h", "hr", "d", "wk", "mo", "y", "yr"}


def _plural(unit: str, value: float) -> str:
    if value == 1 or unit.endswith("s") or unit.lower() in _ABBREVIATIONS:
        return unit
    return unit + "s"


def format_steps(steps: float | None, step: Any = None) -> str:
    """Steps, and what they mean in the chain's step unit.

    Parameters
    ----------
    steps : float or None
        A number of steps (expected steps, mixing time...).  None gives
        ``"not defined"``.
    step : core.model.Step or None
        The real time one step stands for.  A time unit (seconds to years)
        gives a duration; any other unit (``"cycle"``, ``"inspection"``) gives
        a count of that unit.

    Returns
    -------
    str
        For example ``"1.00e12 steps (~2.74 billion years at 1 day per step)"``,
        ``"40 steps (40 inspections)"``, ``"3.4 steps"``.
    """
    if steps is None:
        return "not defined"
    x = float(steps)
    if math.isinf(x):
        return "never (infinitely many steps)"
    word = "step" if x == 1 else "steps"
    head = f"{format_count(x)} {word}"
    if step is None:
        return head
    v = float(step.value)
    unit = str(step.unit).strip()
    per = f"{format_count(v)} {_plural(unit, v)}"
    secs = step_seconds(step)
    if secs is not None:
        return f"{head} (~{format_duration(x * secs)} at {per} per step)"
    total = x * v
    return f"{head} ({format_count(total)} {_plural(unit, total)})"
