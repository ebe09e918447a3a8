"""Solubility curves: the published correlations, fitted with honest uncertainty, evaluated and
inverted on arrays.

Every correlation is written, as published, in a *composition variable* ``y``: the mole fraction
of solute in the solution when both molar masses are known, otherwise the mass fraction (the same
expressions with equal molar masses; the parameters are then empirical). :class:`CompositionBasis`
maps ``y`` to and from ``c`` [kg solute / kg solvent], the unit used everywhere else.

Fits are weighted nonlinear least squares on the *relative* error of ``c`` (constant relative
error is what gravimetric and spectroscopic solubility methods give, common practice), with the
parameter covariance from the Jacobian at the optimum, scaled by the residual variance. Curves
give the 95 % confidence band of the fitted curve by the delta method with Student's t on
``n - p`` degrees of freedom.

Nothing here assumes that solubility rises with temperature: the inverse (saturation
temperature of a concentration) works on falling (retrograde) curves too, and refuses a curve
that turns inside its domain, where the answer would not be unique.

References
----------
.. [1] J. H. van 't Hoff; in the form used for solubility: J. M. Prausnitz, R. N. Lichtenthaler,
   E. G. de Azevedo, *Molecular Thermodynamics of Fluid-Phase Equilibria*, 3rd ed., 1999, ch. 11.
.. [2] A. Apelblat, E. Manzurola, "Solubilities of o-acetylsalicylic, 4-aminosalicylic,
   3,5-dinitrosalicylic, and p-toluic acid, and magnesium-DL-aspartate in water from T = (278 to
   348) K", J. Chem. Thermodyn. 31 (1999) 85-91. doi:10.1006/jcht.1998.0424
.. [3] H. Buchowski, A. Ksiazczak, S. Pietrzyk, "Solvent activity along a saturation line and
   solubility of hydrogen-bonding solids", J. Phys. Chem. 84 (1980) 975-979.
   doi:10.1021/j100446a008
.. [4] J. Gmehling, B. Kolbe, M. Kleiber, J. Rarey, *Chemical Thermodynamics for Process
   Simulation*, Wiley-VCH, 2012, ch. 8 (solid-liquid equilibrium, the Schröder-van Laar equation).
.. [5] K. P. Burnham, D. R. Anderson, *Model Selection and Multimodel Inference*, 2nd ed.,
   Springer, 2002, section 2.4 (AICc).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cached_property
from typing import ClassVar, Protocol

import numba
import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize, stats

from sensor.errors import FitError, SolubilityError
from sensor.numerics import FloatArray, NoConvergence, bracketed_newton

GAS_CONSTANT_J_PER_MOL_K = 1.380649e-23 * 6.02214076e23
"""Molar gas constant R [J/(mol·K)]: exactly the Boltzmann constant times the Avogadro constant
(1.380649e-23 J/K x 6.02214076e23 /mol, SI 2019 definitions)."""

_POLYNOMIAL_REF_TEMP_K = 298.15
_POLYNOMIAL_SCALE_K = 100.0


@dataclass(frozen=True)
class CompositionBasis:
    r"""The composition variable ``y`` a correlation is written in.

    .. math:: y = \frac{r\,c}{1 + r\,c}, \qquad c = \frac{y}{r\,(1 - y)},
              \qquad r = \frac{M_1}{M_2}

    with :math:`M_2` the solute's and :math:`M_1` the solvent's molar mass. ``r = 1`` makes ``y``
    the mass fraction. Build with :meth:`mole_fraction` or :meth:`mass_fraction`.
    """

    name: str
    molar_mass_ratio: float
    """:math:`r = M_1 / M_2` [-]."""

    @classmethod
    def mole_fraction(
        cls, solute_molar_mass_kg_per_mol: float, solvent_molar_mass_kg_per_mol: float
    ) -> CompositionBasis:
        """Mole fraction of solute; for a solvent mixture use its mean molar mass."""
        if not (solute_molar_mass_kg_per_mol > 0 and solvent_molar_mass_kg_per_mol > 0):
            raise ValueError("molar masses must be positive")
        return cls("mole-fraction", solvent_molar_mass_kg_per_mol / solute_molar_mass_kg_per_mol)

    @classmethod
    def mass_fraction(cls) -> CompositionBasis:
        """Mass fraction of solute (when the molar masses are not known)."""
        return cls("mass-fraction", 1.0)

    def from_conc(self, conc: ArrayLike) -> FloatArray:
        """``c`` [kg/kg solvent] to ``y`` [-]."""
        rc = self.molar_mass_ratio * np.asarray(conc, dtype=float)
        return rc / (1.0 + rc)

    def to_conc(self, y: ArrayLike) -> FloatArray:
        """``y`` [-] to ``c`` [kg/kg solvent]."""
        y = np.asarray(y, dtype=float)
        return y / (self.molar_mass_ratio * (1.0 - y))

    def dconc_dy(self, y: ArrayLike) -> FloatArray:
        """:math:`dc/dy = 1 / (r (1 - y)^2)` [kg/kg]."""
        return 1.0 / (self.molar_mass_ratio * (1.0 - np.asarray(y, dtype=float)) ** 2)


class SolubilityModel(Protocol):
    """A correlation ``y(T; params)`` with its analytic derivatives.

    ``temp_k`` is an array of temperatures [K]; ``params`` a 1-D array in the order of
    ``param_names``. Implementations are frozen dataclasses; their fields are fixed constants
    (a melting point, a polynomial degree), never fitted.
    """

    name: ClassVar[str]

    @property
    def param_names(self) -> tuple[str, ...]: ...

    def y(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        """Composition variable at saturation [-]."""
        ...

    def dy_dtemp(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        """:math:`\\partial y / \\partial T` [1/K]."""
        ...

    def dy_dparams(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        """:math:`\\partial y / \\partial \\theta_j`, shape ``temp_k.shape + (p,)``."""
        ...

    def initial_guess(self, temp_k: FloatArray, y: FloatArray) -> FloatArray:
        """A starting point for the fit from data."""
        ...


def _linear_guess(design: FloatArray, target: FloatArray) -> FloatArray:
    solution, *_ = np.linalg.lstsq(design, target, rcond=None)
    return solution


@dataclass(frozen=True)
class VantHoff:
    r"""van 't Hoff: :math:`\ln y = a + b / T`.

    In the mole-fraction basis, :math:`b = -\Delta H_{sol} / R` and :math:`a = \Delta S_{sol} / R`
    (apparent enthalpy and entropy of solution) [1]_.

    Parameters (fitted)
    -------------------
    a : [-]
    b : [K]
    """

    name: ClassVar[str] = "vant-hoff"

    @property
    def param_names(self) -> tuple[str, ...]:
        return ("a", "b")

    def y(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        a, b = params
        return np.exp(a + b / temp_k)

    def dy_dtemp(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        return -params[1] / temp_k**2 * self.y(temp_k, params)

    def dy_dparams(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        y = self.y(temp_k, params)
        return np.stack([y, y / temp_k], axis=-1)

    def initial_guess(self, temp_k: FloatArray, y: FloatArray) -> FloatArray:
        return _linear_guess(np.column_stack([np.ones_like(temp_k), 1.0 / temp_k]), np.log(y))


@dataclass(frozen=True)
class Apelblat:
    r"""Modified Apelblat: :math:`\ln y = a + b / T + c \ln T` [2]_.

    Parameters (fitted)
    -------------------
    a : [-]
    b : [K]
    c : [-] (multiplies :math:`\ln(T / \mathrm{K})`)
    """

    name: ClassVar[str] = "apelblat"

    @property
    def param_names(self) -> tuple[str, ...]:
        return ("a", "b", "c")

    def y(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        a, b, c = params
        return np.exp(a + b / temp_k + c * np.log(temp_k))

    def dy_dtemp(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        _, b, c = params
        return (-b / temp_k**2 + c / temp_k) * self.y(temp_k, params)

    def dy_dparams(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        y = self.y(temp_k, params)
        return np.stack([y, y / temp_k, y * np.log(temp_k)], axis=-1)

    def initial_guess(self, temp_k: FloatArray, y: FloatArray) -> FloatArray:
        design = np.column_stack([np.ones_like(temp_k), 1.0 / temp_k, np.log(temp_k)])
        return _linear_guess(design, np.log(y))


@dataclass(frozen=True)
class LambdaH:
    r"""λh (Buchowski) equation [3]_:

    .. math:: \ln\left[1 + \frac{\lambda (1 - y)}{y}\right]
              = \lambda h \left(\frac{1}{T} - \frac{1}{T_m}\right)

    solved for :math:`y = \lambda / (\lambda + E - 1)` with
    :math:`E = \exp[\lambda h (1/T - 1/T_m)]`.

    Parameters
    ----------
    melt_temp_k : :math:`T_m`, melting temperature of the solute [K] (a constant, not fitted)

    Parameters (fitted)
    -------------------
    lambda : :math:`\lambda` [-]
    h : [K]
    """

    melt_temp_k: float
    name: ClassVar[str] = "lambda-h"

    @property
    def param_names(self) -> tuple[str, ...]:
        return ("lambda", "h")

    # The formulas are compiled ufuncs (below the class): one call each instead of some ten
    # numpy operations, which is most of their cost on the one temperature of a live sample.

    def y(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        return _lambda_h_y(temp_k, params[0], params[1], self.melt_temp_k)

    def dy_dtemp(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        return _lambda_h_dy_dtemp(temp_k, params[0], params[1], self.melt_temp_k)

    def dy_dparams(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        lam, h, melt = params[0], params[1], self.melt_temp_k
        return np.stack(
            [_lambda_h_dy_dlambda(temp_k, lam, h, melt), _lambda_h_dy_dh(temp_k, lam, h, melt)],
            axis=-1,
        )

    def initial_guess(self, temp_k: FloatArray, y: FloatArray) -> FloatArray:
        # For a fixed lambda, h enters linearly: ln(1 + lambda (1-y)/y) = (lambda h) u.
        u = 1.0 / temp_k - 1.0 / self.melt_temp_k
        best: tuple[float, FloatArray] | None = None
        for lam in np.geomspace(1e-3, 1e2, 51):
            lhs = np.log1p(lam * (1.0 - y) / y)
            lam_h = float(u @ lhs / (u @ u))
            params = np.array([lam, lam_h / lam])
            misfit = float(np.sum(np.log(self.y(temp_k, params) / y) ** 2))
            if np.isfinite(misfit) and (best is None or misfit < best[0]):
                best = (misfit, params)
        if best is None:
            raise FitError(
                "lambda-h: no starting point fits the data (is the melting point right?)"
            )
        return best[1]


def _ufunc_of_four(formula: Callable[[float, float, float, float], float]) -> np.ufunc:
    """``formula`` of four floats compiled into a numpy ufunc (numba's own wrapper around the
    ufunc costs about three times the call)."""
    signature = ["float64(float64, float64, float64, float64)"]
    return numba.vectorize(signature, cache=True)(formula).ufunc


@numba.njit(cache=True)
def _lambda_h_exp(temp_k: float, lam: float, h: float, melt_temp_k: float) -> tuple[float, float]:
    """:math:`u = 1/T - 1/T_m` [1/K] and :math:`E = \\exp(\\lambda h u)` of :class:`LambdaH`."""
    u = 1.0 / temp_k - 1.0 / melt_temp_k
    return u, math.exp(lam * h * u)


@_ufunc_of_four
def _lambda_h_y(temp_k: float, lam: float, h: float, melt_temp_k: float) -> float:
    _, e = _lambda_h_exp(temp_k, lam, h, melt_temp_k)
    return lam / (lam + e - 1.0)


@_ufunc_of_four
def _lambda_h_dy_dtemp(temp_k: float, lam: float, h: float, melt_temp_k: float) -> float:
    _, e = _lambda_h_exp(temp_k, lam, h, melt_temp_k)
    return lam**2 * h * e / (temp_k**2 * (lam + e - 1.0) ** 2)


@_ufunc_of_four
def _lambda_h_dy_dlambda(temp_k: float, lam: float, h: float, melt_temp_k: float) -> float:
    u, e = _lambda_h_exp(temp_k, lam, h, melt_temp_k)
    return (e - 1.0 - lam * h * u * e) / (lam + e - 1.0) ** 2


@_ufunc_of_four
def _lambda_h_dy_dh(temp_k: float, lam: float, h: float, melt_temp_k: float) -> float:
    u, e = _lambda_h_exp(temp_k, lam, h, melt_temp_k)
    return -(lam**2) * u * e / (lam + e - 1.0) ** 2


@dataclass(frozen=True)
class Polynomial:
    r"""Polynomial in temperature: :math:`y = \sum_{k=0}^{d} a_k \vartheta^k`,
    :math:`\vartheta = (T - 298.15\ \mathrm{K}) / (100\ \mathrm{K})`.

    The scaled temperature keeps the fit well conditioned and the coefficients portable.
    An empirical correlation (common practice); it may turn, so check the inverse's domain.

    Parameters
    ----------
    degree : :math:`d` (a constant, not fitted), 1 to 5

    Parameters (fitted)
    -------------------
    a0 .. ad : [-]
    """

    degree: int = 2
    name: ClassVar[str] = "polynomial"

    def __post_init__(self) -> None:
        if not 1 <= self.degree <= 5:
            raise ValueError(f"polynomial degree must be 1 to 5; got {self.degree}")

    @property
    def param_names(self) -> tuple[str, ...]:
        return tuple(f"a{k}" for k in range(self.degree + 1))

    @staticmethod
    def _scaled(temp_k: FloatArray) -> FloatArray:
        return (temp_k - _POLYNOMIAL_REF_TEMP_K) / _POLYNOMIAL_SCALE_K

    def y(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        return np.polynomial.polynomial.polyval(self._scaled(temp_k), params)

    def dy_dtemp(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        slope = np.polynomial.polynomial.polyder(params)
        return np.polynomial.polynomial.polyval(self._scaled(temp_k), slope) / _POLYNOMIAL_SCALE_K

    def dy_dparams(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        vander = np.polynomial.polynomial.polyvander(self._scaled(temp_k), self.degree)
        return vander.reshape((*np.shape(temp_k), self.degree + 1))

    def initial_guess(self, temp_k: FloatArray, y: FloatArray) -> FloatArray:
        return _linear_guess(self.dy_dparams(temp_k, np.zeros(self.degree + 1)), y)


@dataclass(frozen=True)
class SchroderVanLaar:
    r"""Ideal solubility from the solute's melting data (Schröder-van Laar) [4]_, a first guess
    when there is no lab data:

    .. math:: \ln(x\gamma) = -\frac{\Delta H_m}{R}\left(\frac{1}{T} - \frac{1}{T_m}\right)
              + \frac{\Delta C_p}{R}\left(\frac{T_m}{T} - 1 - \ln\frac{T_m}{T}\right)

    with :math:`\gamma = 1` for the ideal solution. Only meaningful in the mole-fraction basis.

    Parameters
    ----------
    heat_capacity_change_j_per_mol_k : :math:`\Delta C_p = C_{p,l} - C_{p,s}` [J/(mol·K)]
    activity_coefficient : :math:`\gamma` [-], 1 for the ideal solution

    Parameters (with stated, not fitted, uncertainty)
    -------------------------------------------------
    melt_temp_k : :math:`T_m` [K]
    enthalpy_j_per_mol : :math:`\Delta H_m`, enthalpy of fusion at :math:`T_m` [J/mol]
    """

    heat_capacity_change_j_per_mol_k: float = 0.0
    activity_coefficient: float = 1.0
    name: ClassVar[str] = "ideal"

    @property
    def param_names(self) -> tuple[str, ...]:
        return ("melt_temp_k", "enthalpy_j_per_mol")

    def _ln_x(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        melt, enthalpy = params
        dcp = self.heat_capacity_change_j_per_mol_k
        r = GAS_CONSTANT_J_PER_MOL_K
        return (
            -enthalpy / r * (1.0 / temp_k - 1.0 / melt)
            + dcp / r * (melt / temp_k - 1.0 - np.log(melt / temp_k))
            - np.log(self.activity_coefficient)
        )

    def y(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        return np.exp(self._ln_x(temp_k, params))

    def dy_dtemp(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        melt, enthalpy = params
        dcp = self.heat_capacity_change_j_per_mol_k
        r = GAS_CONSTANT_J_PER_MOL_K
        dln = enthalpy / (r * temp_k**2) + dcp / r * (1.0 / temp_k - melt / temp_k**2)
        return dln * self.y(temp_k, params)

    def dy_dparams(self, temp_k: FloatArray, params: FloatArray) -> FloatArray:
        melt, enthalpy = params
        dcp = self.heat_capacity_change_j_per_mol_k
        r = GAS_CONSTANT_J_PER_MOL_K
        y = self.y(temp_k, params)
        d_melt = -enthalpy / (r * melt**2) + dcp / r * (1.0 / temp_k - 1.0 / melt)
        d_enthalpy = -(1.0 / temp_k - 1.0 / melt) / r
        return np.stack([d_melt * y, d_enthalpy * y], axis=-1)

    def initial_guess(self, temp_k: FloatArray, y: FloatArray) -> FloatArray:
        raise FitError("the ideal-solubility model is set from melting data, not fitted")


@dataclass(frozen=True)
class _InverseTable:
    temp_k: FloatArray  # ascending
    conc: FloatArray  # c_sat at temp_k, strictly monotonic
    rising: bool


@dataclass(frozen=True)
class SolubilityCurve:
    """A solubility curve ``c_sat(T)`` [kg/kg solvent] with its parameter uncertainty.

    Parameters
    ----------
    model : the correlation
    params : its parameters, in the order of ``model.param_names``
    covariance : parameter covariance, shape (p, p)
    basis : the composition variable the correlation is written in
    temp_range_k : temperature range of the data behind the curve [K]
    dof : degrees of freedom for intervals (``n - p`` for a fit; ``inf`` for stated uncertainty)
    extrapolation_margin_k : how far beyond ``temp_range_k`` the curve is still trusted [K];
        outside, :meth:`extrapolated` says so and :meth:`temp_sat` gives no answer
    """

    model: SolubilityModel
    params: FloatArray
    covariance: FloatArray
    basis: CompositionBasis
    temp_range_k: tuple[float, float]
    dof: float
    extrapolation_margin_k: float = 5.0

    def __post_init__(self) -> None:
        params = np.asarray(self.params, dtype=float)
        cov = np.asarray(self.covariance, dtype=float)
        p = len(self.model.param_names)
        if params.shape != (p,):
            raise ValueError(f"{self.model.name}: expected {p} parameters, got {params.shape}")
        if cov.shape != (p, p) or not np.allclose(cov, cov.T, rtol=1e-10, atol=0.0):
            raise ValueError(f"{self.model.name}: covariance must be a symmetric {p}x{p} matrix")
        lo, hi = self.temp_range_k
        margin = self.extrapolation_margin_k
        if not (lo - margin > 0.0 and lo <= hi and margin >= 0.0):
            raise ValueError(
                "temperature range must be ascending and, widened by the margin (>= 0), above 0 K"
            )
        object.__setattr__(self, "params", params)
        object.__setattr__(self, "covariance", cov)

    @property
    def domain_k(self) -> tuple[float, float]:
        """Temperatures the curve is trusted at: the data range widened by the margin [K]."""
        lo, hi = self.temp_range_k
        return lo - self.extrapolation_margin_k, hi + self.extrapolation_margin_k

    def extrapolated(self, temp_k: ArrayLike) -> np.ndarray:
        """True where ``temp_k`` lies outside :attr:`domain_k` (or is not finite)."""
        temp = np.asarray(temp_k, dtype=float)
        lo, hi = self.domain_k
        return ~((temp >= lo) & (temp <= hi))

    def c_sat(self, temp_k: ArrayLike) -> FloatArray:
        """Solubility [kg solute / kg solvent] at ``temp_k`` [K]."""
        return self.basis.to_conc(self.model.y(np.asarray(temp_k, dtype=float), self.params))

    def dc_sat_dtemp(self, temp_k: ArrayLike) -> FloatArray:
        """Slope of the curve :math:`dc_{sat}/dT` [kg/kg/K]; negative for retrograde solubility."""
        temp = np.asarray(temp_k, dtype=float)
        dconc_dy = self.basis.dconc_dy(self.model.y(temp, self.params))
        return dconc_dy * self.model.dy_dtemp(temp, self.params)

    def dc_sat_dparams(self, temp_k: ArrayLike) -> FloatArray:
        """Sensitivity of ``c_sat`` to each parameter, shape ``temp_k.shape + (p,)``."""
        temp = np.asarray(temp_k, dtype=float)
        dconc_dy = self.basis.dconc_dy(self.model.y(temp, self.params))
        return dconc_dy[..., None] * self.model.dy_dparams(temp, self.params)

    def c_sat_std(self, temp_k: ArrayLike) -> FloatArray:
        r"""Standard deviation of the fitted curve at ``temp_k`` (delta method) [kg/kg]:
        :math:`\sqrt{g^\top \Sigma g}`, :math:`g = \partial c_{sat} / \partial \theta`."""
        return self._std_of(self.dc_sat_dparams(temp_k))

    def _std_of(self, dc_sat_dparams: FloatArray) -> FloatArray:
        g = dc_sat_dparams
        return np.sqrt(np.einsum("...i,ij,...j->...", g, self.covariance, g))

    def evaluate(self, temp_k: ArrayLike) -> tuple[FloatArray, FloatArray, FloatArray]:
        """:meth:`c_sat`, :meth:`dc_sat_dtemp` and :meth:`c_sat_std` at ``temp_k`` [K] at once,
        each the same number as its own method gives, with the correlation evaluated once
        (what the soft sensor reports at every sample)."""
        temp = np.asarray(temp_k, dtype=float)
        y = self.model.y(temp, self.params)
        dconc_dy = self.basis.dconc_dy(y)
        slope = dconc_dy * self.model.dy_dtemp(temp, self.params)
        std = self._std_of(dconc_dy[..., None] * self.model.dy_dparams(temp, self.params))
        return self.basis.to_conc(y), slope, std

    def interval(self, temp_k: ArrayLike, level: float = 0.95) -> tuple[FloatArray, FloatArray]:
        """Two-sided confidence band of the curve at ``level`` (Student's t on :attr:`dof`)."""
        if not 0.0 < level < 1.0:
            raise ValueError(f"level must be between 0 and 1; got {level}")
        quantile = stats.t.ppf(0.5 + level / 2.0, self.dof)
        centre = self.c_sat(temp_k)
        half = quantile * self.c_sat_std(temp_k)
        return centre - half, centre + half

    @cached_property
    def _inverse_table(self) -> _InverseTable:
        lo, hi = self.domain_k
        temps = np.linspace(lo, hi, 1025)
        conc = self.c_sat(temps)
        if not np.all(np.isfinite(conc) & (conc > 0.0)):
            raise SolubilityError(
                f"the {self.model.name} curve is not positive and finite over "
                f"{lo - 273.15:.1f} to {hi - 273.15:.1f} °C"
            )
        steps = np.diff(conc)
        if np.all(steps > 0.0) or np.all(steps < 0.0):
            return _InverseTable(temps, conc, rising=bool(steps[0] > 0.0))
        turn = temps[1 + int(np.flatnonzero(np.sign(steps[1:]) != np.sign(steps[:-1]))[0])]
        raise SolubilityError(
            f"the {self.model.name} curve turns near {turn - 273.15:.1f} °C inside its domain "
            f"({lo - 273.15:.1f} to {hi - 273.15:.1f} °C): a concentration has no unique "
            "saturation temperature there"
        )

    @property
    def is_monotonic(self) -> bool:
        """Whether the curve rises or falls throughout :attr:`domain_k` (so it can be inverted)."""
        try:
            self._inverse_table  # noqa: B018 (computes and caches the table)
        except SolubilityError:
            return False
        return True

    def temp_sat(self, conc: ArrayLike, *, max_iterations: int = 40) -> FloatArray:
        """Saturation temperature [K] of solutions of concentration ``conc`` [kg/kg solvent].

        Safeguarded Newton iteration inside the bracketing cell of a table of the curve,
        vectorised. NaN where the concentration is not reached inside :attr:`domain_k`
        (the answer would be an extrapolation) or is not finite.

        Raises
        ------
        SolubilityError
            If the curve turns inside its domain (no unique answer).

        Examples
        --------
        >>> curve = SolubilityCurve(VantHoff(), [2.0, -1500.0], [[0.0, 0.0], [0.0, 0.0]],
        ...                         CompositionBasis.mass_fraction(), (283.15, 333.15), dof=5)
        >>> temp = curve.temp_sat(curve.c_sat([300.0, 320.0]))
        >>> [round(float(t), 9) for t in temp]
        [300.0, 320.0]
        """
        table = self._inverse_table
        conc = np.asarray(conc, dtype=float)
        flat = conc.ravel()
        c_table = table.conc if table.rising else table.conc[::-1]
        t_table = table.temp_k if table.rising else table.temp_k[::-1]
        inside = (flat >= c_table[0]) & (flat <= c_table[-1])
        result = np.full(flat.shape, np.nan)
        target = flat[inside]
        if target.size == 0:
            return result.reshape(conc.shape)
        right = np.minimum(np.maximum(np.searchsorted(c_table, target), 1), len(c_table) - 1)
        left = right - 1
        fraction = (target - c_table[left]) / (c_table[right] - c_table[left])
        start = t_table[left] + fraction * (t_table[right] - t_table[left])

        def residual_and_slope(temp: FloatArray) -> tuple[FloatArray, FloatArray]:
            y = self.model.y(temp, self.params)
            slope = self.basis.dconc_dy(y) * self.model.dy_dtemp(temp, self.params)
            return self.basis.to_conc(y) - target, slope

        try:
            temp = bracketed_newton(
                residual_and_slope,
                t_table[left],
                t_table[right],
                start,
                tolerance=1e-11,
                max_iterations=max_iterations,
            )
        except NoConvergence:
            raise SolubilityError(
                f"saturation temperature did not converge in {max_iterations} steps"
            ) from None
        result[inside] = temp
        return result.reshape(conc.shape)


@dataclass(frozen=True)
class SolubilityFit:
    """The outcome of fitting one correlation to lab data.

    Attributes
    ----------
    curve : the fitted curve
    temp_k, conc : the data [K], [kg/kg solvent]
    predicted : the curve at the data temperatures [kg/kg solvent]
    rss : weighted residual sum of squares (relative residuals) [-]
    aicc : corrected Akaike information criterion [5]_ (lower is better; compare only fits of
        the same data)
    """

    curve: SolubilityCurve
    temp_k: FloatArray
    conc: FloatArray
    predicted: FloatArray
    rss: float
    aicc: float

    @property
    def n_points(self) -> int:
        return len(self.temp_k)

    @property
    def relative_residuals(self) -> FloatArray:
        """``predicted / conc - 1`` [-]."""
        return self.predicted / self.conc - 1.0

    @property
    def rmse(self) -> float:
        """Root-mean-square error of the curve at the data [kg/kg solvent]."""
        return float(np.sqrt(np.mean((self.predicted - self.conc) ** 2)))

    @property
    def rmse_relative(self) -> float:
        """Root-mean-square relative error [-]."""
        return float(np.sqrt(np.mean(self.relative_residuals**2)))


def aicc(rss: float, n_points: int, n_params: int) -> float:
    r"""Corrected Akaike information criterion of a least-squares fit [5]_:

    .. math:: \mathrm{AICc} = n \ln(\mathrm{RSS}/n) + 2k + \frac{2k(k+1)}{n - k - 1}

    with :math:`k` the number of curve parameters. The residual variance, shared by every
    candidate fitted to the same data, is not counted, so ``n >= k + 2`` suffices.
    """
    if n_points < n_params + 2:
        raise FitError(f"AICc needs at least {n_params + 2} points for {n_params} parameters")
    k = n_params
    rss = max(rss, np.finfo(float).tiny)
    return n_points * np.log(rss / n_points) + 2 * k + 2 * k * (k + 1) / (n_points - k - 1)


def _check_data(temp_k: FloatArray, conc: FloatArray, relative_std: FloatArray) -> None:
    if temp_k.ndim != 1 or temp_k.shape != conc.shape or relative_std.shape != conc.shape:
        raise FitError("temperatures, concentrations and weights must be 1-D arrays of one length")
    if not np.all(np.isfinite(temp_k) & np.isfinite(conc) & np.isfinite(relative_std)):
        raise FitError("the data hold a value that is not a finite number")
    if np.any(temp_k <= 0.0):
        raise FitError("temperatures must be above 0 K")
    if np.any(conc <= 0.0):
        raise FitError("concentrations must be positive to fit a solubility curve")
    if np.any(relative_std <= 0.0):
        raise FitError("relative standard deviations must be positive")


def fit_solubility(
    temp_k: ArrayLike,
    conc: ArrayLike,
    model: SolubilityModel,
    basis: CompositionBasis,
    *,
    relative_std: ArrayLike | None = None,
    extrapolation_margin_k: float = 5.0,
) -> SolubilityFit:
    r"""Fit one correlation to solubility data by weighted nonlinear least squares.

    Minimises :math:`\sum_i [(c(T_i) - c_i) / (s_i c_i)]^2` with
    :func:`scipy.optimize.least_squares` and the model's analytic Jacobian. The parameter
    covariance is :math:`\hat\sigma^2 (J^\top J)^{-1}`, :math:`\hat\sigma^2 = \mathrm{RSS}/(n-p)`.

    Parameters
    ----------
    temp_k : saturation temperatures [K]
    conc : solubilities [kg solute / kg solvent]
    model : the correlation to fit
    basis : composition variable the correlation is written in
    relative_std : relative standard deviation of each point [-], or None for equal weights
    extrapolation_margin_k : passed to the curve [K]

    Raises
    ------
    FitError
        Fewer than ``p + 2`` points, bad data, no convergence, or parameters the data cannot
        determine (singular Jacobian).
    """
    temp = np.asarray(temp_k, dtype=float)
    c_obs = np.asarray(conc, dtype=float)
    weights = np.ones_like(c_obs) if relative_std is None else np.asarray(relative_std, float)
    _check_data(temp, c_obs, weights)
    p = len(model.param_names)
    n = len(temp)
    if n < p + 2:
        raise FitError(
            f"{model.name} has {p} parameters and needs at least {p + 2} points; got {n}"
        )
    scale = c_obs * weights

    def residuals(params: FloatArray) -> FloatArray:
        return (basis.to_conc(model.y(temp, params)) - c_obs) / scale

    def jacobian(params: FloatArray) -> FloatArray:
        y = model.y(temp, params)
        return (basis.dconc_dy(y) / scale)[:, None] * model.dy_dparams(temp, params)

    start = model.initial_guess(temp, basis.from_conc(c_obs))
    with np.errstate(all="ignore"):
        if not np.all(np.isfinite(residuals(start))):
            raise FitError(f"{model.name}: the starting point does not describe the data")
        result = optimize.least_squares(
            residuals, start, jac=jacobian, method="lm", x_scale="jac", xtol=1e-14, ftol=1e-14
        )
    if not result.success or not np.all(np.isfinite(result.fun)):
        raise FitError(f"{model.name}: the fit did not converge ({result.message})")
    jac = jacobian(result.x)
    _, singular, vt = np.linalg.svd(jac, full_matrices=False)
    if singular[-1] <= singular[0] * 1e-10:
        raise FitError(f"{model.name}: the data cannot determine all {p} parameters")
    rss = float(result.fun @ result.fun)
    variance = rss / (n - p)
    covariance = variance * (vt.T / singular**2) @ vt
    covariance = 0.5 * (covariance + covariance.T)
    curve = SolubilityCurve(
        model=model,
        params=result.x,
        covariance=covariance,
        basis=basis,
        temp_range_k=(float(temp.min()), float(temp.max())),
        dof=float(n - p),
        extrapolation_margin_k=extrapolation_margin_k,
    )
    return SolubilityFit(
        curve=curve,
        temp_k=temp,
        conc=c_obs,
        predicted=curve.c_sat(temp),
        rss=rss,
        aicc=float(aicc(rss, n, p)),
    )


@dataclass(frozen=True)
class ModelChoice:
    """The outcome of choosing a correlation by AICc.

    Attributes
    ----------
    best : the fit with the lowest AICc
    fits : every candidate that could be fitted, best first
    skipped : candidates that could not be fitted, with the reason
    """

    best: SolubilityFit
    fits: tuple[SolubilityFit, ...]
    skipped: dict[str, str] = field(default_factory=dict)


def choose_solubility_model(
    temp_k: ArrayLike,
    conc: ArrayLike,
    candidates: tuple[SolubilityModel, ...],
    basis: CompositionBasis,
    *,
    relative_std: ArrayLike | None = None,
    extrapolation_margin_k: float = 5.0,
) -> ModelChoice:
    """Fit every candidate and keep the one with the lowest AICc.

    A candidate with more parameters than the data can carry (fewer than ``p + 2`` points) is
    skipped and reported, never fitted: on tiny data sets the simplest curve wins by default.

    Raises
    ------
    FitError
        If no candidate can be fitted; the message gives each one's reason.
    """
    fits: list[SolubilityFit] = []
    skipped: dict[str, str] = {}
    for model in candidates:
        try:
            fits.append(
                fit_solubility(
                    temp_k,
                    conc,
                    model,
                    basis,
                    relative_std=relative_std,
                    extrapolation_margin_k=extrapolation_margin_k,
                )
            )
        except FitError as error:
            skipped[model.name] = str(error)
    if not fits:
        reasons = "; ".join(f"{name}: {why}" for name, why in skipped.items())
        raise FitError(f"no solubility model could be fitted ({reasons})")
    fits.sort(key=lambda fit: fit.aicc)
    return ModelChoice(best=fits[0], fits=tuple(fits), skipped=skipped)


def ideal_solubility_curve(
    melt_temp_k: float,
    enthalpy_j_per_mol: float,
    basis: CompositionBasis,
    temp_range_k: tuple[float, float],
    *,
    melt_temp_std_k: float = 0.0,
    enthalpy_std_j_per_mol: float = 0.0,
    heat_capacity_change_j_per_mol_k: float = 0.0,
    extrapolation_margin_k: float = 5.0,
) -> SolubilityCurve:
    """The Schröder-van Laar ideal-solubility curve as a :class:`SolubilityCurve`.

    Its band comes from the stated standard deviations of the melting point and enthalpy of
    fusion (normal quantiles, ``dof = inf``); with none stated, the band is zero, which says only
    that nothing was stated: real solutions are rarely ideal.

    Parameters
    ----------
    melt_temp_k : melting temperature of the solute [K]
    enthalpy_j_per_mol : enthalpy of fusion [J/mol]
    basis : must be a mole-fraction basis
    temp_range_k : temperatures the curve is meant for [K], below the melting point
    """
    if basis.name != "mole-fraction":
        raise SolubilityError("ideal solubility is a mole fraction: give both molar masses")
    if not temp_range_k[1] < melt_temp_k:
        raise SolubilityError("ideal solubility applies below the solute's melting point")
    return SolubilityCurve(
        model=SchroderVanLaar(heat_capacity_change_j_per_mol_k=heat_capacity_change_j_per_mol_k),
        params=np.array([melt_temp_k, enthalpy_j_per_mol]),
        covariance=np.diag([melt_temp_std_k**2, enthalpy_std_j_per_mol**2]),
        basis=basis,
        temp_range_k=temp_range_k,
        dof=np.inf,
        extrapolation_margin_k=extrapolation_margin_k,
    )


FITTED_MODEL_NAMES = ("vant-hoff", "apelblat", "lambda-h", "polynomial")
"""Names of the correlations that can be fitted, as used in site files and on the CLI."""


def fittable_model(
    name: str, *, melt_temp_k: float | None = None, polynomial_degree: int = 2
) -> SolubilityModel:
    """A fittable correlation by its site-file / CLI name.

    Raises
    ------
    FitError
        For an unknown name, or ``lambda-h`` without the solute's melting point.
    """
    if name == LambdaH.name:
        if melt_temp_k is None:
            raise FitError("lambda-h needs the solute's melting point")
        return LambdaH(melt_temp_k)
    makers = {
        VantHoff.name: VantHoff,
        Apelblat.name: Apelblat,
        Polynomial.name: lambda: Polynomial(polynomial_degree),
    }
    if name not in makers:
        raise FitError(f"unknown solubility model {name!r}; known: {', '.join(FITTED_MODEL_NAMES)}")
    return makers[name]()


def auto_candidates(
    *, melt_temp_k: float | None = None, polynomial_degree: int = 2
) -> tuple[SolubilityModel, ...]:
    """The candidates ``auto`` chooses among: every fittable correlation whose constants are
    known (``lambda-h`` only with a melting point)."""
    names = [n for n in FITTED_MODEL_NAMES if n != LambdaH.name or melt_temp_k is not None]
    return tuple(
        fittable_model(n, melt_temp_k=melt_temp_k, polynomial_degree=polynomial_degree)
        for n in names
    )
