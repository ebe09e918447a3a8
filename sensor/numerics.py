"""Small numerical tools shared by the science modules."""

from __future__ import annotations

import base64
from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from controller.checkpoint import get_float

FloatArray = NDArray[np.float64]
"""A numpy array of floats (the type of every vectorised quantity)."""

ResidualAndSlope = Callable[[FloatArray], tuple[FloatArray, FloatArray]]
"""``x -> (f(x), df/dx)``, elementwise."""


class NoConvergence(ArithmeticError):
    """The iteration did not meet its tolerance in the steps allowed."""


def bracketed_newton(
    residual_and_slope: ResidualAndSlope,
    below: ArrayLike,
    above: ArrayLike,
    start: ArrayLike,
    *,
    tolerance: ArrayLike,
    max_iterations: int = 60,
) -> FloatArray:
    """Solve ``f(x) = 0`` elementwise by Newton's method kept inside a bracket.

    ``f(below) <= 0 <= f(above)`` must hold for every element (``below`` may be on either side
    of ``above``). A Newton step that would leave the bracket is replaced by bisection, so the
    iteration cannot diverge; the bracket shrinks as the signs of ``f`` are seen. Iterates until
    every step is at most ``tolerance``.

    Raises
    ------
    NoConvergence
        If that takes more than ``max_iterations`` steps.
    """
    below = np.array(below, dtype=float)
    above = np.array(above, dtype=float)
    x = np.array(start, dtype=float)
    tolerance = np.asarray(tolerance, dtype=float)
    for _ in range(max_iterations):
        residual, slope = residual_and_slope(x)
        low_side = residual < 0.0
        below = np.where(low_side, x, below)
        above = np.where(low_side, above, x)
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = x - residual / slope
        inside = (newton >= np.minimum(below, above)) & (newton <= np.maximum(below, above))
        updated = np.where(inside, newton, 0.5 * (below + above))
        step = np.abs(updated - x)
        x = updated
        if (step <= tolerance).all():
            return x
    raise NoConvergence(f"no convergence in {max_iterations} iterations")


def put_array(values: ArrayLike) -> dict[str, Any]:
    """A float array as a strict JSON value: its shape and its IEEE 754 doubles, little-endian,
    in base64 (exact, NaN and infinities included; about a third of the text of a list of
    decimal numbers, and written and read without a loop in Python: a filter's checkpoint holds
    some 90 covariance matrices).

    >>> put_array(np.array([[1.5, np.nan]]))
    {'shape': [1, 2], 'f8': 'AAAAAAAA+D8AAAAAAAD4fw=='}
    """
    array = np.asarray(values, dtype="<f8")
    if array.ndim == 0:
        raise ValueError("put_array takes an array, not a number")
    return {"shape": list(array.shape), "f8": base64.b64encode(array.tobytes()).decode("ascii")}


def get_array(values: dict[str, Any] | list[Any]) -> FloatArray:
    """The array :func:`put_array` wrote (or, from checkpoints of earlier releases, nested lists
    of :func:`~controller.checkpoint.put_float` values).

    Raises
    ------
    ValueError
        If the value is neither, or its bytes do not fill its shape.
    """
    if isinstance(values, list):

        def number(item: Any) -> Any:
            return [number(v) for v in item] if isinstance(item, list) else get_float(item)

        return np.array(number(values), dtype=float)
    try:
        shape = tuple(int(n) for n in values["shape"])
        data = base64.b64decode(values["f8"], validate=True)
        return np.frombuffer(data, dtype="<f8").reshape(shape).astype(float)
    except (KeyError, TypeError, ValueError) as error:
        raise ValueError(f"checkpoint: not an array ({error})") from None
