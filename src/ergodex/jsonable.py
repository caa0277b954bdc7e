"""Plain JSON values from the mixed Python and numpy values that results are built of.

Decision records, scorecards and job results hold numbers straight from numpy (``numpy.float64``,
``numpy.int64``, ``numpy.bool_``, small arrays), tuples, and not-a-number where a statistic is
undefined. Strict JSON has no NaN or infinity and :mod:`json` does not know numpy types, so every
such record goes through :func:`jsonable` before it is written. Numpy is recognised by its
``item``/``tolist`` methods, so this module does not import it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

__all__ = ["jsonable"]


def jsonable(value: Any) -> Any:
    """A JSON-ready copy of ``value``.

    Mappings become dicts with string keys, tuples and lists become lists, numpy arrays nested
    lists, numpy scalars the Python ``float``/``int``/``bool``/``str`` they hold, and non-finite
    floats ``None`` (strict JSON has no NaN). Anything else is returned as it is.
    """
    if isinstance(value, Mapping):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    ndim = getattr(value, "ndim", None)
    if isinstance(ndim, int):
        if ndim > 0 and callable(getattr(value, "tolist", None)):  # numpy arrays
            return jsonable(value.tolist())
        if ndim == 0 and callable(getattr(value, "item", None)):  # numpy scalars, 0-d arrays
            value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value
