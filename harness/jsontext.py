"""JSON text that every strict parser reads: no NaN, no Infinity.

Python's ``json`` writes ``NaN`` and ``Infinity`` by default, which RFC 8259 §6 does not
allow ("Numeric values that cannot be represented ... such as Infinity and NaN are not
permitted"), so other tools reject the whole document.  Everything the project prints or
stores as JSON goes through :func:`dumps`: a non-finite number becomes ``null``, and the
record it belongs to says why (an over-range reading carries its reason).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np


def finite(obj: Any, default: Callable[[Any], Any] | None = None) -> Any:
    """``obj`` with every non-finite float replaced by None (recursively); numpy scalars and
    arrays become Python numbers and lists; other objects go through ``default`` first."""
    if obj is None or isinstance(obj, bool | str | int):
        return obj
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, np.generic):
        return finite(obj.item(), default)
    if isinstance(obj, np.ndarray):
        return finite(obj.tolist(), default)
    if isinstance(obj, Mapping):
        return {k: finite(v, default) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [finite(v, default) for v in obj]
    if default is not None:
        return finite(default(obj), default)
    return obj  # json.dumps will say what it cannot write


def dumps(obj: Any, *, default: Callable[[Any], Any] | None = None, **kw: Any) -> str:
    """``json.dumps`` of :func:`finite` ``(obj)`` with ``allow_nan=False``."""
    return json.dumps(finite(obj, default), allow_nan=False, **kw)
