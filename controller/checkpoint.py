"""Numbers in a checkpoint: JSON that any parser accepts, and back, exactly.

A checkpoint (``checkpoint()`` of the guard, the alarm engine and the pipeline) is a dict of
plain JSON values, so the service can store it as text (a file, a JSON column) and a crashed
service can resume a batch from it. Strict JSON has no NaN or infinity, and the states hold
both (a timer not running is NaN, a signal never accepted was accepted at minus infinity), so a
float that is not finite is written as the string ``"nan"``, ``"inf"`` or ``"-inf"``. Finite
floats go through JSON unchanged: Python writes the shortest text that reads back to the same
double.
"""

from __future__ import annotations

import math

NON_FINITE = {"nan": math.nan, "inf": math.inf, "-inf": -math.inf}


def put_float(value: float | None) -> float | str | None:
    """A float as a strict JSON value (None stays None).

    >>> put_float(0.1), put_float(float("nan")), put_float(float("-inf"))
    (0.1, 'nan', '-inf')
    """
    if value is None:
        return None
    value = float(value)
    if math.isfinite(value):
        return value
    return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")


def get_float(value: float | str | None) -> float | None:
    """The float :func:`put_float` wrote (None stays None).

    Raises
    ------
    ValueError
        If ``value`` is a string other than the three it writes.
    """
    if value is None:
        return None
    if isinstance(value, str):
        if value not in NON_FINITE:
            raise ValueError(f"checkpoint: {value!r} is not a number")
        return NON_FINITE[value]
    return float(value)
