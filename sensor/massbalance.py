"""Solute mass balance: how much solid a batch can give.

The rule of the trade (common practice): cooling ``m`` kg of solvent holding ``c1`` kg/kg of
dissolved solute down to where the solution holds ``c2`` deposits ``m (c1 - c2)`` kg of
crystals. It assumes unsolvated crystals (no solvent or water of crystallisation leaves with
them) and no evaporation; a hydrate or solvate needs the solvent balance too.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from sensor.numerics import FloatArray
from sensor.solubility import SolubilityCurve


def crystallized_mass_kg(
    solvent_mass_kg: ArrayLike, conc_start: ArrayLike, conc_end: ArrayLike
) -> FloatArray:
    r"""Mass of unsolvated crystals deposited when the dissolved solute falls from
    ``conc_start`` to ``conc_end``:

    .. math:: m_{crystals} = m_{solvent}\,(c_1 - c_2)

    Parameters
    ----------
    solvent_mass_kg : mass of solvent [kg]
    conc_start, conc_end : dissolved solute before and after [kg/kg solvent]

    Returns
    -------
    mass of crystals [kg]; negative if solid dissolved
    """
    return np.asarray(solvent_mass_kg, float) * (
        np.asarray(conc_start, float) - np.asarray(conc_end, float)
    )


def cooling_yield_kg(
    curve: SolubilityCurve,
    solvent_mass_kg: ArrayLike,
    temp_start_k: ArrayLike,
    temp_end_k: ArrayLike,
) -> FloatArray:
    """Equilibrium crystal mass [kg] from cooling a solution saturated at ``temp_start_k`` [K]
    to ``temp_end_k`` [K] with no supersaturation left: the most a cooling step can give.

    Examples
    --------
    >>> from sensor.solubility import CompositionBasis, SolubilityCurve, VantHoff
    >>> curve = SolubilityCurve(VantHoff(), [2.0, -1500.0], [[0.0, 0.0], [0.0, 0.0]],
    ...                         CompositionBasis.mass_fraction(), (283.15, 333.15), dof=5)
    >>> round(float(cooling_yield_kg(curve, 1000.0, 333.15, 283.15)), 1)
    50.8
    """
    return crystallized_mass_kg(solvent_mass_kg, curve.c_sat(temp_start_k), curve.c_sat(temp_end_k))


def yield_fraction(conc_start: ArrayLike, conc_end: ArrayLike) -> FloatArray:
    """Fraction of the dissolved solute that has crystallised, ``(c1 - c2) / c1`` [-]."""
    start = np.asarray(conc_start, float)
    return (start - np.asarray(conc_end, float)) / start
