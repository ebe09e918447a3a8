"""Small numerical tools shared by the science modules."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from controller.checkpoint import get_float, put_float

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
        if np.all(step <= tolerance):
            return x
    raise NoConvergence(f"no convergence in {max_iterations} iterations")


def put_array(values: ArrayLike) -> list[Any]:
    """A float array as nested lists of strict JSON values (:mod:`controller.checkpoint`).

    >>> put_array(np.array([[1.5, np.nan]]))
    [[1.5, 'nan']]
    """
    array = np.asarray(values, dtype=float)
    if array.ndim == 0:
        raise ValueError("put_array takes an array, not a number")
    if array.ndim == 1:
        return [put_float(v) for v in array.tolist()]
    return [put_array(row) for row in array]


def get_array(values: list[Any]) -> FloatArray:
    """The array :func:`put_array` wrote."""

    def number(item: Any) -> Any:
        return [number(v) for v in item] if isinstance(item, list) else get_float(item)

    return np.array(number(values), dtype=float)
