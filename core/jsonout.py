"""Turning result objects into JSON: the one place that does it.

Frozen dataclasses become dicts (their ``to_json()`` method wins when they have
one), numpy scalars and arrays become Python numbers and lists, tuples become
lists, and floats are written in full precision (``repr``) by :func:`dumps`.
Non-finite floats become ``null`` so the output is strict JSON.
"""
from __future__ import annotations

import dataclasses
import json
import math
from fractions import Fraction
from typing import Any

import numpy as np

__all__ = ["to_jsonable", "dumps"]


def to_jsonable(obj: Any) -> Any:
    """Convert ``obj`` recursively into JSON-ready Python values."""
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (int, np.integer)) and not isinstance(obj, bool):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, Fraction):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if hasattr(obj, "to_json") and callable(obj.to_json):
        return to_jsonable(obj.to_json())
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: to_jsonable(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [to_jsonable(v) for v in obj]
    raise TypeError(f"cannot turn {type(obj).__name__} into JSON")


def dumps(obj: Any, *, indent: int | None = 2) -> str:
    """Strict JSON text of ``obj`` (full-precision floats, UTF-8 characters kept)."""
    return json.dumps(to_jsonable(obj), indent=indent, ensure_ascii=False, allow_nan=False)
