"""Limits that the environment may change, read when they are used.

A variable that is unset or blank leaves the default; any other value must be
a whole number of at least 1 (``2000``, ``2_000``, ``2e3``), and a value that
is not one is an :class:`~core.errors.OptionError` naming the variable, its
value and the default, never silently ignored.
"""
from __future__ import annotations

import math
import os

from .errors import OptionError

__all__ = ["env_whole"]


def env_whole(name: str, default: int, *, unit: str) -> int:
    """The whole number in the environment variable ``name``, or ``default``.

    Parameters
    ----------
    name : str
        The variable, e.g. ``"LONGRUN_MAX_ROWS"``.
    default : int
        Used when the variable is unset or blank.
    unit : str
        What the number counts (for the message), e.g. ``"data rows"``.

    Raises
    ------
    OptionError
        When the value is not a whole number of at least 1.

    Examples
    --------
    >>> os.environ["LONGRUN_EXAMPLE"] = "2e3"
    >>> env_whole("LONGRUN_EXAMPLE", 10, unit="rows")
    2000
    >>> del os.environ["LONGRUN_EXAMPLE"]
    """
    raw = os.environ.get(name)
    if raw is None or not raw.strip():
        return default
    text = raw.strip().replace("_", "")
    try:
        value = int(text)
    except ValueError:
        try:
            f = float(text)
        except ValueError:
            f = math.nan
        value = int(f) if math.isfinite(f) and f.is_integer() else None
    if value is None or value < 1:
        raise OptionError(
            f"the environment variable {name}={raw!r} is not a whole number of {unit} of at least 1 "
            f"(set it to one, or unset it for the default of {default:,})")
    return value
