"""Units at the plant boundary, and the one place they are converted.

Inside sigmatrack a concentration is always ``c`` in kg of solute per kg of solvent, a
temperature is in K and a time in s. Lab files, site files and OPC UA tags speak the plant's
units; they are converted here, once, on the way in and on the way out.

Concentration units understood (the names are those used in site files and on the CLI):

========================  ===============================================  ===================
name                      meaning                                          needs
========================  ===============================================  ===================
``kg/kg``                 kg solute per kg solvent (the internal unit)     --
``g/100g``                g solute per 100 g solvent                       --
``mass-fraction``         kg solute per kg solution, ``w = c / (1 + c)``   --
``mole-fraction``         mol solute per mol solution                      both molar masses
``g/L``                   g solute per litre of solution                   solution density
========================  ===============================================  ===================

Values outside what a unit allows (a negative concentration, a mass fraction of 1 or more) are
refused with :class:`~sensor.errors.UnitError`; nothing is clamped.

References
----------
.. [1] J. W. Mullin, *Crystallization*, 4th ed., Butterworth-Heinemann, 2001, section 3.2
   (expressions of solution composition and their interconversion).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from sensor.errors import UnitError
from sensor.numerics import FloatArray, NoConvergence, bracketed_newton

ZERO_CELSIUS_K = 273.15
"""0 °C in K (exact, by definition of the Celsius scale)."""

DensityFunction = Callable[[FloatArray, FloatArray], FloatArray]
"""Solution density ``rho(temp_k, conc)`` [kg/m³] from temperature [K] and concentration
[kg/kg solvent], vectorised over both."""


def celsius_to_kelvin(temp_c: ArrayLike) -> FloatArray:
    """Temperature [°C] to [K]."""
    return np.asarray(temp_c, dtype=float) + ZERO_CELSIUS_K


def kelvin_to_celsius(temp_k: ArrayLike) -> FloatArray:
    """Temperature [K] to [°C]."""
    return np.asarray(temp_k, dtype=float) - ZERO_CELSIUS_K


def per_minute_to_per_second(rate_per_min: ArrayLike) -> FloatArray:
    """A rate per minute (e.g. a cooling rate [K/min]) to the same rate per second [K/s]."""
    return np.asarray(rate_per_min, dtype=float) / 60.0


def per_second_to_per_minute(rate_per_s: ArrayLike) -> FloatArray:
    """A rate per second [1/s] to the same rate per minute [1/min]."""
    return np.asarray(rate_per_s, dtype=float) * 60.0


def _finite(values: ArrayLike, what: str) -> FloatArray:
    array = np.asarray(values, dtype=float)
    if not np.all(np.isfinite(array)):
        raise UnitError(f"{what} must be finite numbers; got {array[~np.isfinite(array)][:3]}")
    return array


def _non_negative(values: ArrayLike, what: str) -> FloatArray:
    array = _finite(values, what)
    if np.any(array < 0.0):
        raise UnitError(f"{what} cannot be negative; got {array[array < 0.0][:3]}")
    return array


def _fraction(values: ArrayLike, what: str) -> FloatArray:
    array = _non_negative(values, what)
    if np.any(array >= 1.0):
        raise UnitError(f"{what} must be below 1; got {array[array >= 1.0][:3]}")
    return array


# --- kg/kg solvent <-> g/100 g solvent ------------------------------------------------------


def g_per_100g_to_kg_per_kg(conc_g_per_100g: ArrayLike) -> FloatArray:
    """Concentration [g solute / 100 g solvent] to [kg solute / kg solvent]."""
    return _non_negative(conc_g_per_100g, "a concentration in g/100g") / 100.0


def kg_per_kg_to_g_per_100g(conc: ArrayLike) -> FloatArray:
    """Concentration [kg/kg solvent] to [g solute / 100 g solvent]."""
    return _non_negative(conc, "a concentration in kg/kg") * 100.0


# --- kg/kg solvent <-> mass fraction of solution --------------------------------------------


def mass_fraction_to_kg_per_kg(mass_fraction: ArrayLike) -> FloatArray:
    r"""Mass fraction of solute in the solution ``w`` [-] to ``c`` [kg/kg solvent].

    .. math:: c = \frac{w}{1 - w}
    """
    w = _fraction(mass_fraction, "a mass fraction")
    return w / (1.0 - w)


def kg_per_kg_to_mass_fraction(conc: ArrayLike) -> FloatArray:
    r"""``c`` [kg/kg solvent] to the mass fraction of solute in the solution ``w`` [-].

    .. math:: w = \frac{c}{1 + c}
    """
    c = _non_negative(conc, "a concentration in kg/kg")
    return c / (1.0 + c)


# --- kg/kg solvent <-> mole fraction of solution --------------------------------------------


def _check_molar_masses(solute_molar_mass: float, solvent_molar_mass: float) -> None:
    for name, value in (("solute", solute_molar_mass), ("solvent", solvent_molar_mass)):
        if not (np.isfinite(value) and value > 0.0):
            raise UnitError(f"the {name} molar mass must be a positive number; got {value}")


def mole_fraction_to_kg_per_kg(
    mole_fraction: ArrayLike, solute_molar_mass: float, solvent_molar_mass: float
) -> FloatArray:
    r"""Mole fraction of solute ``x`` [-] to ``c`` [kg/kg solvent].

    .. math:: c = \frac{x\,M_2}{(1 - x)\,M_1}

    Parameters
    ----------
    mole_fraction : mole fraction of the solute in the solution [-]
    solute_molar_mass : :math:`M_2` [kg/mol] (any unit, if the same as the solvent's)
    solvent_molar_mass : :math:`M_1` [kg/mol]; for a solvent mixture, its mean molar mass
    """
    _check_molar_masses(solute_molar_mass, solvent_molar_mass)
    x = _fraction(mole_fraction, "a mole fraction")
    return x * solute_molar_mass / ((1.0 - x) * solvent_molar_mass)


def kg_per_kg_to_mole_fraction(
    conc: ArrayLike, solute_molar_mass: float, solvent_molar_mass: float
) -> FloatArray:
    r"""``c`` [kg/kg solvent] to the mole fraction of solute ``x`` [-].

    .. math:: x = \frac{c / M_2}{c / M_2 + 1 / M_1}
    """
    _check_molar_masses(solute_molar_mass, solvent_molar_mass)
    c = _non_negative(conc, "a concentration in kg/kg")
    moles_solute = c / solute_molar_mass
    return moles_solute / (moles_solute + 1.0 / solvent_molar_mass)


# --- kg/kg solvent <-> g/L of solution -------------------------------------------------------


@dataclass(frozen=True)
class LinearDensity:
    r"""Solution density linear in temperature and mass fraction (common practice for a
    narrow range; fit it to the site's own density data).

    .. math:: \rho = \rho_0 + a\,(T - T_0) + b\,w, \qquad w = c/(1 + c)

    Parameters
    ----------
    reference_kg_per_m3 : :math:`\rho_0`, density of the solute-free solvent at :math:`T_0` [kg/m³]
    reference_temp_k : :math:`T_0` [K]
    temp_coef_kg_per_m3_k : :math:`a` [kg/(m³·K)], usually negative
    mass_fraction_coef_kg_per_m3 : :math:`b` [kg/m³] per unit mass fraction of solute
    """

    reference_kg_per_m3: float
    reference_temp_k: float
    temp_coef_kg_per_m3_k: float
    mass_fraction_coef_kg_per_m3: float

    def __call__(self, temp_k: FloatArray, conc: FloatArray) -> FloatArray:
        w = np.asarray(conc, dtype=float) / (1.0 + np.asarray(conc, dtype=float))
        return (
            self.reference_kg_per_m3
            + self.temp_coef_kg_per_m3_k * (np.asarray(temp_k, dtype=float) - self.reference_temp_k)
            + self.mass_fraction_coef_kg_per_m3 * w
        )


def kg_per_kg_to_g_per_l(
    conc: ArrayLike, temp_k: ArrayLike, density: DensityFunction
) -> FloatArray:
    r"""``c`` [kg/kg solvent] to the mass concentration of solute [g/L solution].

    .. math:: C = \rho(T, c)\,\frac{c}{1 + c}

    (1 kg/m³ is 1 g/L.)

    Parameters
    ----------
    conc : concentration [kg/kg solvent]
    temp_k : temperature [K], broadcast against ``conc``
    density : solution density ``rho(temp_k, conc)`` [kg/m³]
    """
    c = _non_negative(conc, "a concentration in kg/kg")
    temp = _finite(temp_k, "a temperature")
    return density(temp, c) * c / (1.0 + c)


def g_per_l_to_kg_per_kg(
    conc_g_per_l: ArrayLike,
    temp_k: ArrayLike,
    density: DensityFunction,
    *,
    max_iterations: int = 80,
) -> FloatArray:
    r"""Mass concentration of solute [g/L solution] to ``c`` [kg/kg solvent].

    Solves :math:`\rho(T, c)\,c/(1 + c) = C` for :math:`c`, vectorised: the density may depend
    on :math:`c`, so there is no closed form in general. The root is bracketed by doubling, then
    found by Newton's method with a central-difference slope, kept inside the bracket.

    Raises
    ------
    UnitError
        If the mass concentration cannot be reached (at or above what the solution density
        allows), or the iteration does not converge.
    """
    target, temp = np.broadcast_arrays(
        _non_negative(conc_g_per_l, "a concentration in g/L"), _finite(temp_k, "a temperature")
    )
    target = np.array(target, dtype=float)
    temp = np.array(temp, dtype=float)

    def mass_conc(conc: FloatArray) -> FloatArray:
        return density(temp, conc) * conc / (1.0 + conc)

    above = np.full_like(target, 1e-3)
    for _ in range(64):
        short = mass_conc(above) < target
        if not np.any(short):
            break
        above = np.where(short, 4.0 * above, above)
    else:
        raise UnitError("a concentration in g/L must be below the solution density")

    def residual_and_slope(conc: FloatArray) -> tuple[FloatArray, FloatArray]:
        step = 1e-7 * (1.0 + conc)
        low = np.maximum(conc - step, 0.0)
        slope = (mass_conc(conc + step) - mass_conc(low)) / (conc + step - low)
        return mass_conc(conc) - target, slope

    try:
        return bracketed_newton(
            residual_and_slope,
            np.zeros_like(target),
            above,
            0.5 * above,
            tolerance=1e-15 * (1.0 + above),
            max_iterations=max_iterations,
        )
    except NoConvergence:
        raise UnitError(f"g/L to kg/kg did not converge in {max_iterations} iterations") from None


# --- the boundary: one converter per unit name ----------------------------------------------


@dataclass(frozen=True)
class ConcentrationUnit:
    """A named concentration unit with its conversions to and from kg/kg solvent.

    Build one with :func:`concentration_unit`; pass extra data (molar masses, density) there.
    ``temp_k`` is only used by units that depend on temperature (``g/L``).
    """

    name: str
    _to_internal: Callable[[FloatArray, FloatArray], FloatArray]
    _from_internal: Callable[[FloatArray, FloatArray], FloatArray]

    def to_kg_per_kg(self, value: ArrayLike, temp_k: ArrayLike = np.nan) -> FloatArray:
        """Value in this unit to [kg/kg solvent]."""
        return self._to_internal(np.asarray(value, dtype=float), np.asarray(temp_k, dtype=float))

    def from_kg_per_kg(self, conc: ArrayLike, temp_k: ArrayLike = np.nan) -> FloatArray:
        """Value in [kg/kg solvent] to this unit."""
        return self._from_internal(np.asarray(conc, dtype=float), np.asarray(temp_k, dtype=float))


CONCENTRATION_UNIT_NAMES = ("kg/kg", "g/100g", "mass-fraction", "mole-fraction", "g/L")


def concentration_unit(
    name: str,
    *,
    solute_molar_mass: float | None = None,
    solvent_molar_mass: float | None = None,
    density: DensityFunction | None = None,
) -> ConcentrationUnit:
    """The converter for a unit named as in site files and on the CLI.

    Parameters
    ----------
    name : one of ``CONCENTRATION_UNIT_NAMES``
    solute_molar_mass, solvent_molar_mass : [kg/mol], needed by ``mole-fraction``
    density : ``rho(temp_k, conc)`` [kg/m³], needed by ``g/L``

    Examples
    --------
    >>> unit = concentration_unit("g/100g")
    >>> float(unit.to_kg_per_kg(12.5))
    0.125
    """
    simple = {
        "kg/kg": (
            lambda v, _t: _non_negative(v, "a concentration in kg/kg"),
            lambda c, _t: _non_negative(c, "a concentration in kg/kg"),
        ),
        "g/100g": (
            lambda v, _t: g_per_100g_to_kg_per_kg(v),
            lambda c, _t: kg_per_kg_to_g_per_100g(c),
        ),
        "mass-fraction": (
            lambda v, _t: mass_fraction_to_kg_per_kg(v),
            lambda c, _t: kg_per_kg_to_mass_fraction(c),
        ),
    }
    if name in simple:
        to_internal, from_internal = simple[name]
        return ConcentrationUnit(name, to_internal, from_internal)
    if name == "mole-fraction":
        if solute_molar_mass is None or solvent_molar_mass is None:
            raise UnitError("the unit 'mole-fraction' needs the solute and solvent molar masses")
        m2, m1 = solute_molar_mass, solvent_molar_mass
        return ConcentrationUnit(
            name,
            lambda v, _t: mole_fraction_to_kg_per_kg(v, m2, m1),
            lambda c, _t: kg_per_kg_to_mole_fraction(c, m2, m1),
        )
    if name == "g/L":
        if density is None:
            raise UnitError("the unit 'g/L' needs the solution density")
        return ConcentrationUnit(
            name,
            lambda v, t: g_per_l_to_kg_per_kg(v, t, density),
            lambda c, t: kg_per_kg_to_g_per_l(c, t, density),
        )
    raise UnitError(
        f"unknown concentration unit {name!r}; known: {', '.join(CONCENTRATION_UNIT_NAMES)}"
    )
