r"""The soft sensor's estimation model: a moments model of a batch cooling crystallizer.

State (per kg of solvent; the order is the filter's, see :class:`StateLayout`):

=========  ===================================================================  ==========
index      state                                                                unit
=========  ===================================================================  ==========
0          reactor temperature :math:`T`                                        K
1          dissolved solute :math:`c`                                           kg/kg
2 .. 5     scaled moments :math:`\zeta_k = \rho_c k_v L_r^{3-k} \mu_k`,          kg/kg
           k = 0 .. 3
6          growth-rate scale factor :math:`\theta` (only when it is estimated)  --
last       analyzer bias :math:`b` (measured = :math:`c(t - d) + b` + noise)    kg/kg
=========  ===================================================================  ==========

:math:`\mu_k = \int n(L) L^k dL` are the moments of the crystal size distribution per kg of
solvent [m^k/kg]; they span 20 orders of magnitude, so the filter carries them scaled by the
crystal density :math:`\rho_c`, the volume shape factor :math:`k_v` and a reference size
:math:`L_r` = 100 µm. Every scaled moment is then a mass ratio of the order of the solids
content: :math:`\zeta_3` *is* the solids content [kg crystals / kg solvent], and
:math:`L_r \zeta_{k}/\zeta_{k-1} = \mu_k/\mu_{k-1}` are the mean sizes.

Equations (method of moments for size-independent growth, nuclei of negligible size [1]_ [2]_):

.. math::

    \frac{dT}{dt} &= a\,(T_j - T), \qquad a = UA / (m c_p) \\
    \sigma &= c / c_{sat}(T) - 1 \\
    G &= \theta k_g \sigma^g \ (\sigma > 0), \qquad G = k_d \sigma \ (\sigma \le 0) \\
    B &= k_b \sigma^b M_T^j \ (\sigma > 0), \qquad B = 0 \ (\sigma \le 0),
        \qquad M_T = \max(\zeta_3, 0) \\
    \frac{d\zeta_0}{dt} &= \rho_c k_v L_r^3 B, \qquad
    \frac{d\zeta_k}{dt} = k \frac{G}{L_r} \zeta_{k-1} \ (k = 1, 2, 3) \\
    \frac{dc}{dt} &= -\frac{d\zeta_3}{dt} = -3 \frac{G}{L_r} \zeta_2

with the jacket temperature :math:`T_j` a measured input, held between samples. The heat of
crystallisation is neglected (dilute systems; the temperature state's process noise covers it).
Before seeding or nucleation every moment is zero and the model reduces to the solute mass balance
(:math:`c` constant) and the heat balance. Seeding adds the seed's moments at once
(:func:`seed_moments`). Dissolution (:math:`\sigma < 0`) shrinks crystals at :math:`k_d \sigma`;
the moments equations stop being exact when crystals vanish (fines dissolving completely), and
left alone they would carry the moments below zero (negative solids, and solute beyond the
charge). So the model stops smoothly: in a dissolving Euler sub-step a falling moment decays
exponentially instead of linearly (:func:`dissolve_into`), tending to zero as the crystals
vanish and never crossing it, with :math:`c + \zeta_3` conserved exactly. The stop lives in
:func:`step_points`, which the live filter and the replay kernel both step through, and it is
continuous, so both paths agree to rounding. (A common-practice closure, not from [1]_;
:func:`rates` and :func:`step_jacobian`, which the forecast and the EKF's Jacobian use, keep the
plain equations.)

Discretisation: explicit Euler in sub-steps of at most ``max_step_s`` (first order; at the default
1 s the error is orders of magnitude below the kinetics' own uncertainty, see
``tests/test_crystallizer.py`` against :func:`scipy.integrate.solve_ivp`). The solubility curve is
seen through a cubic Hermite table of :math:`c_{sat}` and its analytic slope, built once from the
fitted curve (:func:`solubility_table`), so that one compiled kernel serves every correlation.

All functions here are compiled with numba: the live filter calls them once per sigma point, the
replay kernel inlines them.

References
----------
.. [1] A. D. Randolph, M. A. Larson, *Theory of Particulate Processes*, 2nd ed., Academic Press,
   1988, ch. 3 and 4 (population balance, method of moments).
.. [2] J. W. Mullin, *Crystallization*, 4th ed., Butterworth-Heinemann, 2001, ch. 6 (growth and
   secondary nucleation kinetics, :math:`B = k_b \sigma^b M_T^j`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np

from sensor.errors import SigmatrackError
from sensor.numerics import FloatArray
from sensor.solubility import SolubilityCurve

MOMENT_SIZE_SCALE_M = 1.0e-4
"""The reference size :math:`L_r` of the scaled moments [m] (100 µm)."""

TABLE_STEP_K = 0.05
"""Node spacing of the solubility table [K]; the cubic Hermite error is below 1e-10 relative for
the smooth correlations sigmatrack fits."""

TABLE_WIDENING_K = 20.0
"""How far beyond the curve's trusted domain the table reaches [K], so that sigma points near the
domain's edge still see the curve (the outputs flag extrapolation, from the curve itself)."""

# Indices into the packed parameter vector the compiled functions take.
P_HEAT_RATE = 0  # a = UA / (m c_p) [1/s]
P_GROWTH_K = 1  # k_g [m/s]
P_GROWTH_ORDER = 2  # g [-]
P_DISSOLUTION_K = 3  # k_d [m/s]
P_NUCLEATION_K = 4  # k_b [1/(kg s)]
P_NUCLEATION_ORDER = 5  # b [-]
P_SOLIDS_EXPONENT = 6  # j [-]
P_NUCLEUS_MASS = 7  # rho_c k_v L_r^3 [kg]
P_MAX_STEP = 8  # largest Euler sub-step [s]
P_TABLE_START = 9  # temperature of the table's first node [K]
P_TABLE_STEP = 10  # node spacing [K]
P_HAS_GROWTH_SCALE = 11  # 1.0 when theta is a state
N_PARAMS = 12

TEMP, CONC, ZETA0, ZETA1, ZETA2, ZETA3, GROWTH_SCALE = 0, 1, 2, 3, 4, 5, 6


class ModelError(SigmatrackError, ValueError):
    """The estimation model cannot be built from the parameters given."""


@dataclass(frozen=True)
class StateLayout:
    """Where each quantity sits in the state vector.

    Parameters
    ----------
    estimate_growth_scale : whether :math:`\\theta` is a state (index 6); the bias is last
    """

    estimate_growth_scale: bool

    @property
    def size(self) -> int:
        return 8 if self.estimate_growth_scale else 7

    @property
    def bias(self) -> int:
        return self.size - 1

    @property
    def names(self) -> tuple[str, ...]:
        theta = ("growth_scale",) if self.estimate_growth_scale else ()
        return ("temp_k", "conc", "zeta0", "zeta1", "zeta2", "zeta3", *theta, "analyzer_bias")


@dataclass(frozen=True)
class Kinetics:
    """Growth, dissolution and secondary nucleation kinetics, in SI.

    Parameters
    ----------
    growth_rate_constant_m_per_s : :math:`k_g` [m/s]
    growth_order : :math:`g` [-], at least 1 (the EKF's Jacobian needs it finite at 0)
    nucleation_rate_constant_per_kg_s : :math:`k_b` [1/(kg solvent · s)]
    nucleation_order : :math:`b` [-], at least 1
    nucleation_solids_exponent : :math:`j` [-]
    dissolution_rate_constant_m_per_s : :math:`k_d` [m/s]
    """

    growth_rate_constant_m_per_s: float
    growth_order: float
    nucleation_rate_constant_per_kg_s: float
    nucleation_order: float
    nucleation_solids_exponent: float = 1.0
    dissolution_rate_constant_m_per_s: float = 0.0

    def __post_init__(self) -> None:
        if self.growth_order < 1.0 or self.nucleation_order < 1.0:
            raise ModelError(
                f"growth and nucleation orders must be at least 1; got g = {self.growth_order}, "
                f"b = {self.nucleation_order}"
            )
        for name in (
            "growth_rate_constant_m_per_s",
            "nucleation_rate_constant_per_kg_s",
            "nucleation_solids_exponent",
            "dissolution_rate_constant_m_per_s",
        ):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0.0):
                raise ModelError(f"{name} must be a finite number >= 0; got {value}")


@dataclass(frozen=True)
class CrystallizerModel:
    """Everything the compiled model functions need, packed once.

    Build with :func:`build_model`. ``params`` is the packed vector (``P_*`` indices) and
    ``table`` the solubility table, shape (2, nodes): :math:`c_{sat}` [kg/kg] and its slope
    [kg/kg/K] at each node.
    """

    layout: StateLayout
    params: FloatArray
    table: FloatArray
    crystal_density_kg_per_m3: float
    volume_shape_factor: float


def solubility_table(
    curve: SolubilityCurve, step_k: float = TABLE_STEP_K
) -> tuple[float, FloatArray]:
    """Nodes of the cubic Hermite table of a solubility curve: start temperature [K] and the
    (2, nodes) array of :math:`c_{sat}` [kg/kg] and :math:`dc_{sat}/dT` [kg/kg/K].

    The table spans the curve's domain widened by :data:`TABLE_WIDENING_K` on each side, or less
    where the correlation stops being positive and finite there.
    """
    lo, hi = curve.domain_k
    lo_wide = max(lo - TABLE_WIDENING_K, 1.0)
    temps = np.arange(lo_wide, hi + TABLE_WIDENING_K + step_k, step_k)
    with np.errstate(all="ignore"):
        conc = curve.c_sat(temps)
        slope = curve.dc_sat_dtemp(temps)
    usable = np.isfinite(conc) & np.isfinite(slope) & (conc > 0.0)
    inside = (temps >= lo) & (temps <= hi)
    if not np.all(usable[inside]):
        raise ModelError("the solubility curve is not positive and finite over its domain")
    # keep the longest usable run that contains the domain
    first = int(np.flatnonzero(inside)[0])
    last = int(np.flatnonzero(inside)[-1])
    while first > 0 and usable[first - 1]:
        first -= 1
    while last < len(temps) - 1 and usable[last + 1]:
        last += 1
    return float(temps[first]), np.vstack([conc[first : last + 1], slope[first : last + 1]])


def build_model(
    curve: SolubilityCurve,
    kinetics: Kinetics,
    *,
    heat_transfer_w_per_k: float,
    heat_capacity_j_per_k: float,
    crystal_density_kg_per_m3: float,
    volume_shape_factor: float,
    estimate_growth_scale: bool = True,
    max_step_s: float = 1.0,
) -> CrystallizerModel:
    """Pack a crystallizer model.

    Parameters
    ----------
    curve : the solubility curve :math:`c_{sat}(T)`
    kinetics : growth, dissolution and nucleation kinetics
    heat_transfer_w_per_k : :math:`UA` between contents and jacket [W/K]
    heat_capacity_j_per_k : :math:`m c_p` of the contents [J/K]
    crystal_density_kg_per_m3 : :math:`\\rho_c` [kg/m³]
    volume_shape_factor : :math:`k_v` [-]
    estimate_growth_scale : carry :math:`\\theta` as a state
    max_step_s : largest Euler sub-step [s]
    """
    for name, value in (
        ("heat_transfer_w_per_k", heat_transfer_w_per_k),
        ("heat_capacity_j_per_k", heat_capacity_j_per_k),
        ("crystal_density_kg_per_m3", crystal_density_kg_per_m3),
        ("volume_shape_factor", volume_shape_factor),
        ("max_step_s", max_step_s),
    ):
        if not (math.isfinite(value) and value > 0.0):
            raise ModelError(f"{name} must be a positive number; got {value}")
    start, table = solubility_table(curve)
    params = np.zeros(N_PARAMS)
    params[P_HEAT_RATE] = heat_transfer_w_per_k / heat_capacity_j_per_k
    params[P_GROWTH_K] = kinetics.growth_rate_constant_m_per_s
    params[P_GROWTH_ORDER] = kinetics.growth_order
    params[P_DISSOLUTION_K] = kinetics.dissolution_rate_constant_m_per_s
    params[P_NUCLEATION_K] = kinetics.nucleation_rate_constant_per_kg_s
    params[P_NUCLEATION_ORDER] = kinetics.nucleation_order
    params[P_SOLIDS_EXPONENT] = kinetics.nucleation_solids_exponent
    params[P_NUCLEUS_MASS] = (
        crystal_density_kg_per_m3 * volume_shape_factor * MOMENT_SIZE_SCALE_M**3
    )
    params[P_MAX_STEP] = max_step_s
    params[P_TABLE_START] = start
    params[P_TABLE_STEP] = TABLE_STEP_K
    params[P_HAS_GROWTH_SCALE] = 1.0 if estimate_growth_scale else 0.0
    return CrystallizerModel(
        layout=StateLayout(estimate_growth_scale),
        params=params,
        table=table,
        crystal_density_kg_per_m3=crystal_density_kg_per_m3,
        volume_shape_factor=volume_shape_factor,
    )


def seed_moments(
    seed_mass_kg: float, solvent_mass_kg: float, mean_size_m: float, size_std_m: float
) -> FloatArray:
    r"""Scaled moments :math:`\zeta_0 .. \zeta_3` [kg/kg solvent] of a seed charge with a
    normal size distribution of mean :math:`\bar L` and standard deviation :math:`s`:

    .. math:: m_0 = 1,\ m_1 = \bar L,\ m_2 = \bar L^2 + s^2,\ m_3 = \bar L^3 + 3\bar L s^2,
              \qquad \zeta_k = \frac{m_{seed}}{m_{solvent}} L_r^{3-k} \frac{m_k}{m_3}

    (raw moments of the normal distribution; :math:`\zeta_3` is the seed loading).

    Examples
    --------
    >>> z = seed_moments(3.0, 1600.0, 60e-6, 0.0)
    >>> round(float(z[3]), 6), round(float(z[0] / z[3]), 3)
    (0.001875, 4.63)
    """
    if not (seed_mass_kg >= 0.0 and solvent_mass_kg > 0.0 and mean_size_m > 0.0):
        raise ModelError("seed mass must be >= 0, solvent mass and mean seed size positive")
    if not size_std_m >= 0.0:
        raise ModelError(f"seed size std cannot be negative; got {size_std_m}")
    mean, var = mean_size_m, size_std_m**2
    raw = np.array([1.0, mean, mean**2 + var, mean**3 + 3.0 * mean * var])
    scale = MOMENT_SIZE_SCALE_M ** (3 - np.arange(4))
    return seed_mass_kg / solvent_mass_kg * scale * raw / raw[3]


@numba.njit(cache=True)
def c_sat_from_table(temp_k: float, params: FloatArray, table: FloatArray) -> tuple[float, float]:
    """:math:`c_{sat}` [kg/kg] and :math:`dc_{sat}/dT` [kg/kg/K] at ``temp_k`` [K] from the cubic
    Hermite table; linear beyond its ends (with the end slope)."""
    start = params[P_TABLE_START]
    step = params[P_TABLE_STEP]
    nodes = table.shape[1]
    u = (temp_k - start) / step
    if u <= 0.0:
        return table[0, 0] + (temp_k - start) * table[1, 0], table[1, 0]
    if u >= nodes - 1:
        end = start + (nodes - 1) * step
        return table[0, nodes - 1] + (temp_k - end) * table[1, nodes - 1], table[1, nodes - 1]
    i = int(u)
    s = u - i
    s2 = s * s
    s3 = s2 * s
    c0 = table[0, i]
    c1 = table[0, i + 1]
    d0 = table[1, i] * step
    d1 = table[1, i + 1] * step
    value = (2 * s3 - 3 * s2 + 1) * c0 + (s3 - 2 * s2 + s) * d0 + (3 * s2 - 2 * s3) * c1
    value += (s3 - s2) * d1
    slope = (6 * s2 - 6 * s) * (c0 - c1) + (3 * s2 - 4 * s + 1) * d0 + (3 * s2 - 2 * s) * d1
    return value, slope / step


@numba.njit(cache=True)
def kinetics(
    temp_k: float, conc: float, params: FloatArray, table: FloatArray
) -> tuple[float, float, float, bool]:
    """The part of the rates that depends only on :math:`(T, c)`: :math:`\\sigma`, the growth
    rate before :math:`\\theta` [m/s], :math:`k_b \\sigma^b` [1/(kg s)] and whether
    :math:`\\sigma > 0` (growth, scaled by :math:`\\theta`) or not (dissolution)."""
    c_sat, _ = c_sat_from_table(temp_k, params, table)
    return kinetics_at_c_sat(c_sat, conc, params)


@numba.njit(cache=True)
def kinetics_at_c_sat(
    c_sat: float, conc: float, params: FloatArray
) -> tuple[float, float, float, bool]:
    """:func:`kinetics` with the solubility [kg/kg] already looked up (for a forecast whose
    temperature is prescribed, the same for every sigma point)."""
    sigma = conc / c_sat - 1.0
    if sigma > 0.0:
        # powers through one logarithm (this runs for every sigma point of every step)
        log_sigma = math.log(sigma)
        growth = params[P_GROWTH_K] * math.exp(params[P_GROWTH_ORDER] * log_sigma)
        birth = params[P_NUCLEATION_K] * math.exp(params[P_NUCLEATION_ORDER] * log_sigma)
        return sigma, growth, birth, True
    return sigma, params[P_DISSOLUTION_K] * sigma, 0.0, False


@numba.njit(cache=True)
def rates_with(
    x: FloatArray,
    jacket_temp_k: float,
    growth_base: float,
    birth_base: float,
    growing: bool,
    params: FloatArray,
    out: FloatArray,
) -> None:
    """:func:`rates` from the :func:`kinetics` of ``x``'s temperature and concentration, into
    ``out[TEMP]`` .. ``out[ZETA3]``; the other entries (the growth scale's and the bias's, whose
    rates are zero) are left as they are."""
    growth = growth_base
    if growing and params[P_HAS_GROWTH_SCALE] > 0.5:
        growth *= x[GROWTH_SCALE]
    birth = birth_base
    exponent = params[P_SOLIDS_EXPONENT]
    if growing:
        if exponent == 1.0:
            birth *= max(x[ZETA3], 0.0)
        elif exponent != 0.0:
            birth *= max(x[ZETA3], 0.0) ** exponent
    gamma = growth / MOMENT_SIZE_SCALE_M
    out[TEMP] = params[P_HEAT_RATE] * (jacket_temp_k - x[TEMP])
    out[ZETA0] = params[P_NUCLEUS_MASS] * birth
    out[ZETA1] = gamma * x[ZETA0]
    out[ZETA2] = 2.0 * gamma * x[ZETA1]
    out[ZETA3] = 3.0 * gamma * x[ZETA2]
    out[CONC] = -out[ZETA3]


@numba.njit(cache=True)
def rates(
    x: FloatArray, jacket_temp_k: float, params: FloatArray, table: FloatArray, out: FloatArray
) -> None:
    """Write :math:`dx/dt` (the module's equations) into ``out``; ``x`` is one state vector."""
    _, growth, birth, growing = kinetics(x[TEMP], x[CONC], params, table)
    out[:] = 0.0
    rates_with(x, jacket_temp_k, growth, birth, growing, params, out)


@numba.njit(cache=True)
def rates_jacobian(
    x: FloatArray, jacket_temp_k: float, params: FloatArray, table: FloatArray, out: FloatArray
) -> None:
    """Write the analytic Jacobian :math:`\\partial (dx/dt) / \\partial x` into ``out`` (n, n)."""
    out[:, :] = 0.0
    temp = x[TEMP]
    c_sat, slope = c_sat_from_table(temp, params, table)
    sigma = x[CONC] / c_sat - 1.0
    dsigma_dtemp = -x[CONC] * slope / (c_sat * c_sat)
    dsigma_dconc = 1.0 / c_sat
    has_scale = params[P_HAS_GROWTH_SCALE] > 0.5
    scale = x[GROWTH_SCALE] if has_scale else 1.0
    growth_order = params[P_GROWTH_ORDER]
    if sigma > 0.0:
        base = params[P_GROWTH_K] * sigma**growth_order
        growth = scale * base
        dgrowth_dsigma = scale * params[P_GROWTH_K] * growth_order * sigma ** (growth_order - 1.0)
        dgrowth_dscale = base
        order = params[P_NUCLEATION_ORDER]
        exponent = params[P_SOLIDS_EXPONENT]
        solids = max(x[ZETA3], 0.0)
        kb = params[P_NUCLEATION_K]
        solids_term = solids**exponent if exponent != 0.0 else 1.0
        dbirth_dsigma = kb * order * sigma ** (order - 1.0) * solids_term
        if exponent != 0.0 and solids > 0.0:
            dbirth_dsolids = kb * sigma**order * exponent * solids ** (exponent - 1.0)
        else:
            dbirth_dsolids = 0.0
    else:
        growth = params[P_DISSOLUTION_K] * sigma
        dgrowth_dsigma = params[P_DISSOLUTION_K]
        dgrowth_dscale = 0.0
        dbirth_dsigma = 0.0
        dbirth_dsolids = 0.0
    inv_l = 1.0 / MOMENT_SIZE_SCALE_M
    gamma = growth * inv_l
    out[TEMP, TEMP] = -params[P_HEAT_RATE]
    nucleus = params[P_NUCLEUS_MASS]
    out[ZETA0, TEMP] = nucleus * dbirth_dsigma * dsigma_dtemp
    out[ZETA0, CONC] = nucleus * dbirth_dsigma * dsigma_dconc
    out[ZETA0, ZETA3] = nucleus * dbirth_dsolids
    for k in range(1, 4):
        row = ZETA0 + k
        lower = x[row - 1]
        out[row, TEMP] = k * lower * dgrowth_dsigma * dsigma_dtemp * inv_l
        out[row, CONC] = k * lower * dgrowth_dsigma * dsigma_dconc * inv_l
        out[row, row - 1] += k * gamma
        if has_scale:
            out[row, GROWTH_SCALE] = k * lower * dgrowth_dscale * inv_l
    for col in range(x.shape[0]):
        out[CONC, col] = -out[ZETA3, col]


@numba.njit(cache=True)
def substeps(dt: float, max_step_s: float) -> int:
    """Number of equal Euler sub-steps of at most ``max_step_s`` in ``dt`` [s] (at least 1;
    a step a hair longer than ``max_step_s`` from rounding is not split)."""
    return int(dt / max_step_s - 1e-9) + 1


@numba.njit(cache=True)
def step_into(
    x: FloatArray,
    dt: float,
    jacket_temp_k: float,
    params: FloatArray,
    table: FloatArray,
    out: FloatArray,
    slope: FloatArray,
) -> None:
    """:func:`step` without allocating: the new state into ``out``, ``slope`` is scratch."""
    n = x.shape[0]
    step_points(
        x.reshape((1, n)),
        np.zeros(1, dtype=np.bool_),
        dt,
        jacket_temp_k,
        params,
        table,
        out.reshape((1, n)),
        slope,
        slope,
    )


@numba.njit(cache=True)
def stop_moments(x: FloatArray) -> bool:
    r"""Bring a filter's mean back onto physical moments, in place: a negative
    :math:`\zeta_k` is set to zero, and a negative :math:`\zeta_3`'s deficit is taken from
    :math:`c`, so that the dissolved plus crystallised solute :math:`c + \zeta_3` is kept.

    The mean's counterpart of :func:`dissolve_into`, after a predict or an update (the sigma
    points' spread and the analyzer's correlation with the solids can carry it below zero); a
    clamp, continuous in ``x``. Both filter paths call it at the same places
    (``sensor.kalman`` and the replay kernel ``sensor.batchfilter``), so they agree. Returns
    whether it changed ``x``.
    """
    if x[ZETA3] < 0.0:
        x[CONC] += x[ZETA3]
    changed = False
    for j in range(ZETA0, ZETA3 + 1):
        if x[j] < 0.0:
            x[j] = 0.0
            changed = True
    return changed


@numba.njit(cache=True)
def dissolve_into(x: FloatArray, h: float, slope: FloatArray) -> None:
    r"""The smooth stop of a dissolving Euler sub-step of ``h`` [s]: replace the moments' rates
    in ``slope`` so that no positive :math:`\zeta_k` crosses zero.

    A moment :math:`\zeta_k > 0` that falls at the rate :math:`r_k = k G \zeta_{k-1} / L_r < 0`
    moves to :math:`\zeta_k \exp(h r_k / \zeta_k)` (first-order equal to the Euler step, and
    tending to zero, never below, as the crystals vanish); one at or below zero that would fall
    further stays where it is. Both are continuous in ``x``, so rounding differences between
    two paths are not amplified. :math:`dc/dt = -d\zeta_3/dt` is kept, so :math:`c + \zeta_3`
    is conserved exactly.
    """
    for k in range(1, 4):
        j = ZETA0 + k
        rate = slope[j]
        if rate < 0.0:
            if x[j] > 0.0:
                slope[j] = x[j] * (math.exp(h * rate / x[j]) - 1.0) / h
            else:
                slope[j] = 0.0
    slope[CONC] = -slope[ZETA3]


@numba.njit(cache=True)
def step_points(
    points: FloatArray,
    skip: np.ndarray,
    dt: float,
    jacket_temp_k: float,
    params: FloatArray,
    table: FloatArray,
    out: FloatArray,
    slope: FloatArray,
    first_slope: FloatArray,
) -> None:
    """:func:`step_into` on every row of ``points`` not marked in ``skip``, into ``out``, bit for
    bit the same, but computing :func:`kinetics` only for a temperature and concentration not
    seen in the first row or the last computed one (sigma points share them with the mean in all
    but the first two directions, so most rows reuse the mean's). Row 0 must not be skipped;
    its rates at the start (:func:`rates` of ``points[0]``) go to ``first_slope``."""
    count = points.shape[0]
    for i in range(count):
        if not skip[i]:
            out[i, :] = points[i]
    if dt <= 0.0:
        return
    steps = substeps(dt, params[P_MAX_STEP])
    h = dt / steps
    slope[:] = 0.0  # rates_with leaves the zero rates of the growth scale and the bias alone
    for sub in range(steps):
        # two remembered (T, c): the first row's (the mean's) and the last computed
        first_temp, first_conc = out[0, TEMP], out[0, CONC]
        _, first_growth, first_birth, first_growing = kinetics(
            first_temp, first_conc, params, table
        )
        last_temp, last_conc = first_temp, first_conc
        growth, birth, growing = first_growth, first_birth, first_growing
        for i in range(count):
            if skip[i]:
                continue
            row = out[i]
            if row[TEMP] == first_temp and row[CONC] == first_conc:
                g, b, grows = first_growth, first_birth, first_growing
            else:
                if not (row[TEMP] == last_temp and row[CONC] == last_conc):
                    _, growth, birth, growing = kinetics(row[TEMP], row[CONC], params, table)
                    last_temp, last_conc = row[TEMP], row[CONC]
                g, b, grows = growth, birth, growing
            rates_with(row, jacket_temp_k, g, b, grows, params, slope)
            if sub == 0 and i == 0:
                first_slope[:] = slope
            if not grows:
                dissolve_into(row, h, slope)
            for j in range(ZETA3 + 1):  # the growth scale and the bias do not move
                row[j] += h * slope[j]


@numba.njit(cache=True)
def step(
    x: FloatArray, dt: float, jacket_temp_k: float, params: FloatArray, table: FloatArray
) -> FloatArray:
    """The state after ``dt`` [s] (Euler sub-steps of at most ``max_step_s``); a new array."""
    out = np.empty_like(x)
    step_into(x, dt, jacket_temp_k, params, table, out, np.empty_like(x))
    return out


@numba.njit(cache=True)
def step_jacobian(
    x: FloatArray, dt: float, jacket_temp_k: float, params: FloatArray, table: FloatArray
) -> FloatArray:
    """Jacobian of :func:`step` with respect to ``x``: the product of the sub-steps'
    :math:`I + h J(x_i)`."""
    n = x.shape[0]
    total = np.eye(n)
    if dt <= 0.0:
        return total
    count = substeps(dt, params[P_MAX_STEP])
    h = dt / count
    state = x.copy()
    slope = np.empty(n)
    jac = np.empty((n, n))
    for _ in range(count):
        rates_jacobian(state, jacket_temp_k, params, table, jac)
        local = np.eye(n) + h * jac
        total = local @ total
        rates(state, jacket_temp_k, params, table, slope)
        for i in range(n):
            state[i] += h * slope[i]
    return total
