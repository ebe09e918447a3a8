r"""The population balance on a size grid: conservative finite volumes with a flux limiter.

For a well-mixed batch with size-dependent growth rate :math:`G(L, t)` and nucleation
:math:`B(t)` at the smallest size, the number density :math:`n(L, t)` [1/(m·kg solvent)] obeys
[1]_

.. math:: \frac{\partial n}{\partial t} + \frac{\partial (G n)}{\partial L} = 0,
          \qquad G(0, t)\, n(0, t) = B(t) \quad (G > 0)

and, while crystals dissolve (:math:`G < 0`), they leave the grid at :math:`L = 0`: the fines
vanish first. The grid is uniform, :math:`N` cells of width :math:`\Delta L` from 0 to
:math:`L_{max}`; the state is the count :math:`N_i = n_i \Delta L` of crystals per kg solvent in
each cell, and a crystal in cell :math:`i` has the cell's centre size :math:`L_i`. One explicit
step moves counts across cell faces with the upwind value plus the Lax-Wendroff correction
limited by van Leer's limiter [2]_ [3]_ (second order in space and time where the distribution
is smooth, no new extrema, non-negative counts) under the Courant condition
:math:`|G|\,\Delta t / \Delta L \le 1/2`:

.. math:: N_i^{+} = N_i - \nu_{i+1/2} N_{i+1/2} + \nu_{i-1/2} N_{i-1/2}, \qquad
          N_{i+1/2} = N_i + (1 - \nu_{i+1/2}) \frac{a b}{a + b}\ \ (ab > 0), \qquad
          a = N_i - N_{i-1},\ b = N_{i+1} - N_i

with :math:`\nu = G \Delta t / \Delta L` at the face. The face at :math:`L_{max}` is closed
(the grid must be large enough); crystals dissolving through :math:`L = 0` leave at the upwind
(first-order) value. Counts are conserved exactly by the flux form; the crystal
mass of the discrete distribution, :math:`\rho_c k_v \sum_i N_i L_i^3`, is what the solute
balance takes its solute from (:mod:`simulators.crystallizer`).

References
----------
.. [1] A. D. Randolph, M. A. Larson, *Theory of Particulate Processes*, 2nd ed., Academic Press,
   1988, ch. 3 (the population balance) and ch. 4 (its moments).
.. [2] B. van Leer, "Towards the ultimate conservative difference scheme. II. Monotonicity and
   conservation combined in a second-order scheme", J. Comput. Phys. 14 (1974) 361-370.
   doi:10.1016/0021-9991(74)90019-9
.. [3] P. K. Sweby, "High resolution schemes using flux limiters for hyperbolic conservation
   laws", SIAM J. Numer. Anal. 21 (1984) 995-1011. doi:10.1137/0721062
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from sensor.numerics import FloatArray

COURANT_LIMIT = 0.5
"""Largest :math:`|G|\\Delta t/\\Delta L` the limited scheme stays non-negative at (TVD bound)."""


@dataclass(frozen=True)
class SizeGrid:
    """A uniform grid of crystal sizes from 0 to ``max_size_m``.

    Parameters
    ----------
    n_classes : number of cells [-]
    max_size_m : upper edge of the last cell [m]
    """

    n_classes: int
    max_size_m: float

    def __post_init__(self) -> None:
        if self.n_classes < 2 or not self.max_size_m > 0.0:
            raise ValueError("a size grid needs at least 2 classes and a positive largest size")

    @property
    def width_m(self) -> float:
        """:math:`\\Delta L` [m]."""
        return self.max_size_m / self.n_classes

    @cached_property
    def edges_m(self) -> FloatArray:
        """Cell faces :math:`L_{i-1/2}` [m], ``n_classes + 1`` of them."""
        return np.linspace(0.0, self.max_size_m, self.n_classes + 1)

    @cached_property
    def centres_m(self) -> FloatArray:
        """Cell centres :math:`L_i` [m]: the size of a crystal counted in the cell."""
        return 0.5 * (self.edges_m[1:] + self.edges_m[:-1])

    @cached_property
    def centres_cubed(self) -> FloatArray:
        """:math:`L_i^3` [m³]."""
        return self.centres_m**3


def growth_step(counts: FloatArray, courant: FloatArray) -> FloatArray:
    r"""One explicit, flux-limited step of the size advection (module equations).

    Parameters
    ----------
    counts : crystals per kg solvent in each cell [1/kg], shape (n,)
    courant : :math:`\nu = G \Delta t / \Delta L` at each face [-], shape (n + 1,), all of one
        sign: positive for growth (nothing crosses the face at :math:`L = 0`: nucleation is added
        by the caller), negative for dissolution (crystals leave through :math:`L = 0`). The
        face at :math:`L_{max}` is closed either way.

    Returns
    -------
    the counts after the step [1/kg]; their total is unchanged by growth, and falls by what
    left through :math:`L = 0` by dissolution

    Raises
    ------
    ValueError
        If :math:`|\nu|` exceeds :data:`COURANT_LIMIT` (take smaller steps) or the shapes differ.

    Examples
    --------
    >>> counts = np.array([0.0, 1.0, 0.0, 0.0])
    >>> [float(x) for x in growth_step(counts, np.full(5, 0.5))]
    [0.0, 0.5, 0.5, 0.0]
    """
    if courant.shape != (counts.shape[0] + 1,):
        raise ValueError(f"courant needs {counts.shape[0] + 1} faces; got {courant.shape}")
    if np.max(np.abs(courant)) > COURANT_LIMIT:
        raise ValueError(f"Courant number {np.max(np.abs(courant)):.3g} above {COURANT_LIMIT}")
    shrinking = bool(courant[0] < 0.0 or courant[-1] < 0.0)
    if shrinking:
        counts, courant = counts[::-1], -courant[::-1]
    padded = np.concatenate(([0.0], counts, [0.0]))
    jumps = np.diff(padded)
    backward, forward = jumps[:-1], jumps[1:]
    product = backward * forward
    slope = np.zeros_like(product)
    np.divide(product, backward + forward, out=slope, where=product > 0.0)
    flux = courant[1:] * (counts + (1.0 - courant[1:]) * slope)
    # The face at L_max is closed; crystals leave through L = 0 at the upwind value (a limited
    # value against an empty ghost cell would hold them back).
    flux[-1] = courant[-1] * counts[-1] if shrinking else 0.0
    updated = counts - flux
    updated[1:] += flux[:-1]
    return updated[::-1] if shrinking else updated


def normal_counts(
    grid: SizeGrid, mass: float, mean_m: float, std_m: float, mass_factor: float
) -> FloatArray:
    r"""Counts of a normal size distribution, truncated at zero, holding exactly ``mass``.

    .. math:: N_i \propto \exp\left[-\frac{(L_i - \bar L)^2}{2 s^2}\right], \qquad
              m_{crystal} \sum_i N_i L_i^3 = \text{mass}

    Parameters
    ----------
    grid : the size grid
    mass : crystal mass to place [kg per kg solvent]
    mean_m, std_m : mean size and standard deviation of the distribution [m]
    mass_factor : :math:`\rho_c k_v` [kg/m³]: crystal mass per size cubed

    Examples
    --------
    >>> grid = SizeGrid(100, 1e-3)
    >>> counts = normal_counts(grid, 0.002, 60e-6, 15e-6, 1310 * 0.45)
    >>> round(float(crystal_mass(counts, grid, 1310 * 0.45)), 12)
    0.002
    """
    if mass < 0.0 or not (mean_m > 0.0 and std_m > 0.0):
        raise ValueError("a size distribution needs a mass >= 0 and a positive mean and std")
    shape = np.exp(-0.5 * ((grid.centres_m - mean_m) / std_m) ** 2)
    shape_mass = mass_factor * float(shape @ grid.centres_cubed)
    if shape_mass <= 0.0:
        raise ValueError("the size distribution lies outside the grid")
    return shape * (mass / shape_mass)


def crystal_mass(counts: FloatArray, grid: SizeGrid, mass_factor: float) -> float:
    """Mass of the crystals counted [kg per kg solvent]: :math:`\\rho_c k_v \\sum N_i L_i^3`."""
    return mass_factor * float(counts @ grid.centres_cubed)


def moment(counts: FloatArray, grid: SizeGrid, order: int) -> float:
    """The ``order``-th moment :math:`\\mu_k = \\sum_i N_i L_i^k` [m^k per kg solvent]."""
    return float(counts @ grid.centres_m**order)


def mean_size_m(counts: FloatArray, grid: SizeGrid) -> float:
    r"""Volume-weighted mean size :math:`L_{43} = \mu_4 / \mu_3` [m] (De Brouckere mean); 0
    when there are no crystals."""
    third = float(counts @ grid.centres_cubed)
    return float(counts @ (grid.centres_cubed * grid.centres_m)) / third if third > 0.0 else 0.0
