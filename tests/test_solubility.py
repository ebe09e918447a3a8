"""Solubility correlations, fits, bands and the inverse, checked against the outside world.

Outside checks: the CRC Handbook's aqueous solubility tables (tests/handbook.py, quoted from
memory), and ``chemicals.solubility.solubility_eutectic`` (C. Bell et al., the `chemicals`
library) with the worked example it documents (Gmehling et al., Chemical Thermodynamics for
Process Simulation, Wiley-VCH, 2012). Synthetic-data checks test the method itself and are
marked as such.
"""

from __future__ import annotations

import numpy as np
import pytest
from chemicals.solubility import solubility_eutectic

from sensor.errors import FitError, SolubilityError
from sensor.solubility import (
    Apelblat,
    CompositionBasis,
    LambdaH,
    Polynomial,
    SchroderVanLaar,
    SolubilityCurve,
    VantHoff,
    auto_candidates,
    choose_solubility_model,
    fit_solubility,
    ideal_solubility_curve,
)
from sensor.units import mass_fraction_to_kg_per_kg
from tests.handbook import (
    CRC_AQUEOUS_SOLUBILITY_MASS_PERCENT,
    CRC_AQUEOUS_SOLUBILITY_RETROGRADE,
    CRC_AQUEOUS_SOLUBILITY_TEMPS_C,
    WATER_MOLAR_MASS_G_PER_MOL,
)

MASS = CompositionBasis.mass_fraction()
MOLE = CompositionBasis.mole_fraction(0.2863, 0.0314)

# Parameters chosen to give solubilities of a few percent near room temperature.
MODELS_AND_PARAMS = [
    (VantHoff(), np.array([2.0, -1500.0])),
    (Apelblat(), np.array([-23.3, -1333.0, 4.0])),
    (LambdaH(melt_temp_k=441.15), np.array([0.05, 14000.0])),
    (Polynomial(3), np.array([0.05, 0.08, 0.05, 0.01])),
    (SchroderVanLaar(heat_capacity_change_j_per_mol_k=35.0), np.array([441.15, 32000.0])),
]
TEMPS_K = np.linspace(280.0, 345.0, 7)


def _curve(model, params, basis=MASS, temp_range_k=(283.15, 343.15)):
    p = len(params)
    return SolubilityCurve(model, params, np.zeros((p, p)), basis, temp_range_k, dof=10)


@pytest.mark.parametrize(
    ("model", "params"), MODELS_AND_PARAMS, ids=lambda m: getattr(m, "name", "")
)
def test_analytic_temperature_derivative(model, params):
    step = 1e-4
    numeric = (model.y(TEMPS_K + step, params) - model.y(TEMPS_K - step, params)) / (2 * step)
    np.testing.assert_allclose(model.dy_dtemp(TEMPS_K, params), numeric, rtol=1e-7)


@pytest.mark.parametrize(
    ("model", "params"), MODELS_AND_PARAMS, ids=lambda m: getattr(m, "name", "")
)
def test_analytic_parameter_derivatives(model, params):
    analytic = model.dy_dparams(TEMPS_K, params)
    assert analytic.shape == (len(TEMPS_K), len(params))
    for j, value in enumerate(params):
        step = 1e-5 * max(abs(value), 1.0)
        up, down = params.copy(), params.copy()
        up[j] += step
        down[j] -= step
        numeric = (model.y(TEMPS_K, up) - model.y(TEMPS_K, down)) / (2 * step)
        np.testing.assert_allclose(analytic[:, j], numeric, rtol=1e-6, atol=1e-10)


def test_curve_slope_matches_numerical():
    curve = _curve(Apelblat(), np.array([-23.3, -1333.0, 4.0]), basis=MOLE)
    step = 1e-4
    numeric = (curve.c_sat(TEMPS_K + step) - curve.c_sat(TEMPS_K - step)) / (2 * step)
    np.testing.assert_allclose(curve.dc_sat_dtemp(TEMPS_K), numeric, rtol=1e-7)


# --- ideal solubility against the reference library ----------------------------------------


@pytest.mark.parametrize("dcp", [0.0, 35.0, -20.0])
def test_ideal_matches_chemicals_on_a_grid(dcp):
    # chemicals.solubility.solubility_eutectic(T, Tm, Hm, Cpl, Cps, gamma)
    model = SchroderVanLaar(heat_capacity_change_j_per_mol_k=dcp)
    melt, enthalpy = 441.15, 32000.0
    temps = np.linspace(250.0, 430.0, 37)
    ours = model.y(temps, np.array([melt, enthalpy]))
    reference = [solubility_eutectic(T=t, Tm=melt, Hm=enthalpy, Cpl=dcp, Cps=0.0) for t in temps]
    np.testing.assert_allclose(ours, reference, rtol=1e-12)


def test_ideal_gmehling_worked_example():
    # Gmehling, Kolbe, Kleiber, Rarey (2012), the example quoted in chemicals'
    # solubility_eutectic docstring: T = 260 K, Tm = 278.68 K, Hm = 9952 J/mol, gamma = 3.0176
    # gives x = 0.243400713.
    model = SchroderVanLaar(activity_coefficient=3.0176)
    x = model.y(np.array(260.0), np.array([278.68, 9952.0]))
    assert float(x) == pytest.approx(0.243400713, rel=1e-8)


def test_ideal_curve_band_from_stated_uncertainty():
    curve = ideal_solubility_curve(
        441.15, 32000.0, MOLE, (283.15, 343.15), melt_temp_std_k=1.0, enthalpy_std_j_per_mol=1500.0
    )
    lo, hi = curve.interval(313.15)
    assert lo < curve.c_sat(313.15) < hi
    with pytest.raises(SolubilityError, match="mole fraction"):
        ideal_solubility_curve(441.15, 32000.0, MASS, (283.15, 343.15))
    with pytest.raises(SolubilityError, match="below the solute's melting point"):
        ideal_solubility_curve(300.0, 32000.0, MOLE, (283.15, 343.15))


# --- fits: recovery and honest bands (facts of the method, checked on synthetic data) ------


def test_parameter_recovery_on_synthetic_data(rng):
    # A fact of least squares, not an outside source: with correct weights, the estimates fall
    # within a few standard deviations of the parameters that made the data.
    truth = np.array([-23.3, -1333.0, 4.0])
    temps = np.linspace(278.15, 343.15, 30)
    clean = _curve(Apelblat(), truth, basis=MOLE).c_sat(temps)
    noisy = clean * (1.0 + 0.005 * rng.standard_normal(temps.size))
    fit = fit_solubility(temps, noisy, Apelblat(), MOLE)
    z = (fit.curve.params - truth) / np.sqrt(np.diag(fit.curve.covariance))
    assert np.all(np.abs(z) < 4.0), z
    assert fit.rmse_relative == pytest.approx(0.005, rel=0.35)


def test_confidence_band_covers_the_truth_about_95_percent(rng):
    # Coverage of the delta-method band with Student's t, over 400 seeded replicate data sets
    # (a property of the method). Binomial 3-sigma range around 0.95 for 400 trials: 0.917-0.983.
    truth = np.array([2.0, -1500.0])
    temps = np.linspace(283.15, 343.15, 8)
    clean = _curve(VantHoff(), truth).c_sat(temps)
    probe = np.array([290.0, 320.0])
    true_at_probe = _curve(VantHoff(), truth).c_sat(probe)
    covered = 0
    trials = 400
    for _ in range(trials):
        noisy = clean * (1.0 + 0.02 * rng.standard_normal(temps.size))
        lo, hi = fit_solubility(temps, noisy, VantHoff(), MASS).curve.interval(probe)
        covered += int(np.all((lo <= true_at_probe) & (true_at_probe <= hi)))
    # Both probes jointly: expect a little below 95 %, as the two are correlated but not equal.
    assert 0.88 <= covered / trials <= 0.983


def test_band_is_wider_outside_the_data():
    temps = np.linspace(293.15, 323.15, 7)
    conc = _curve(VantHoff(), np.array([2.0, -1500.0])).c_sat(temps) * (
        1 + 0.01 * np.array([1, -1, 0.5, 0, -0.5, 1, -1])
    )
    curve = fit_solubility(temps, conc, VantHoff(), MASS).curve
    width_inside = np.diff(curve.interval(308.15), axis=0) / curve.c_sat(308.15)
    width_outside = np.diff(curve.interval(340.15), axis=0) / curve.c_sat(340.15)
    assert width_outside > 2 * width_inside


# --- fits against the handbook -----------------------------------------------------------


FIT_TEMPS_C = (0, 20, 25, 40, 60, 80, 100)  # fit on these, predict the other five


@pytest.mark.parametrize(
    "solute", sorted(CRC_AQUEOUS_SOLUBILITY_MASS_PERCENT | CRC_AQUEOUS_SOLUBILITY_RETROGRADE)
)
def test_handbook_held_out_temperatures(solute):
    # Tolerance 1.5 % relative: the table gives three significant figures (rounding up to
    # 0.4 % for its smallest entries), the values are quoted from memory, and the handbook
    # itself smoothed them; a correlation chosen by AICc on seven points should do no worse.
    table = CRC_AQUEOUS_SOLUBILITY_MASS_PERCENT | CRC_AQUEOUS_SOLUBILITY_RETROGRADE
    molar_mass, mass_percent = table[solute]
    temps_k = CRC_AQUEOUS_SOLUBILITY_TEMPS_C + 273.15
    conc = mass_fraction_to_kg_per_kg(np.array(mass_percent) / 100.0)
    used = np.isin(CRC_AQUEOUS_SOLUBILITY_TEMPS_C, FIT_TEMPS_C)
    basis = CompositionBasis.mole_fraction(molar_mass / 1000, WATER_MOLAR_MASS_G_PER_MOL / 1000)
    choice = choose_solubility_model(temps_k[used], conc[used], auto_candidates(), basis)
    predicted = choice.best.curve.c_sat(temps_k[~used])
    np.testing.assert_allclose(predicted, conc[~used], rtol=0.015)


def test_retrograde_handbook_curve_inverts():
    # Lithium carbonate (CRC table): solubility falls with temperature. The inverse must not
    # assume a rising curve.
    molar_mass, mass_percent = CRC_AQUEOUS_SOLUBILITY_RETROGRADE["Li2CO3"]
    temps_k = CRC_AQUEOUS_SOLUBILITY_TEMPS_C + 273.15
    conc = mass_fraction_to_kg_per_kg(np.array(mass_percent) / 100.0)
    basis = CompositionBasis.mole_fraction(molar_mass / 1000, WATER_MOLAR_MASS_G_PER_MOL / 1000)
    curve = fit_solubility(temps_k, conc, Apelblat(), basis).curve
    assert np.all(curve.dc_sat_dtemp(temps_k) < 0)
    probe = np.linspace(275.0, 370.0, 50)
    np.testing.assert_allclose(curve.temp_sat(curve.c_sat(probe)), probe, rtol=0, atol=1e-9)


# --- the inverse -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("model", "params"), MODELS_AND_PARAMS, ids=lambda m: getattr(m, "name", "")
)
def test_inverse_round_trip(model, params):
    curve = _curve(model, params, basis=MOLE)
    temps = np.linspace(*curve.domain_k, 201)
    np.testing.assert_allclose(curve.temp_sat(curve.c_sat(temps)), temps, rtol=0, atol=1e-9)


def test_inverse_outside_domain_is_nan_and_keeps_shape():
    curve = _curve(VantHoff(), np.array([2.0, -1500.0]))
    lo, hi = curve.domain_k
    conc = curve.c_sat(np.array([[lo - 1.0, 300.0], [hi + 1.0, 310.0]]))
    conc[1, 1] = np.nan
    temps = curve.temp_sat(conc)
    assert temps.shape == (2, 2)
    assert np.isnan(temps).tolist() == [[True, False], [True, True]]
    assert temps[0, 1] == pytest.approx(300.0, abs=1e-9)


def test_inverse_refuses_a_curve_that_turns():
    vertex = (310.0 - 298.15) / 100.0
    params = np.array([0.1 - vertex**2, 2 * vertex, -1.0])  # y = 0.1 - (theta - vertex)^2
    curve = _curve(Polynomial(2), params, temp_range_k=(290.0, 330.0))
    assert not curve.is_monotonic
    with pytest.raises(SolubilityError, match=r"turns near 3[67]\.\d °C"):
        curve.temp_sat(0.05)


def test_extrapolation_flag_uses_margin():
    curve = SolubilityCurve(
        VantHoff(),
        [2.0, -1500.0],
        np.zeros((2, 2)),
        MASS,
        (290.0, 330.0),
        dof=5,
        extrapolation_margin_k=2.0,
    )
    flags = curve.extrapolated(np.array([287.9, 288.0, 310.0, 332.0, 332.1, np.nan]))
    assert flags.tolist() == [True, False, False, False, True, True]


# --- refusals ----------------------------------------------------------------------------


def test_too_few_points_refused():
    temps = np.array([290.0, 300.0, 310.0, 320.0])
    conc = np.array([0.05, 0.06, 0.075, 0.09])
    with pytest.raises(
        FitError, match="apelblat has 3 parameters and needs at least 5 points; got 4"
    ):
        fit_solubility(temps, conc, Apelblat(), MASS)
    choice = choose_solubility_model(temps, conc, auto_candidates(), MASS)
    assert choice.best.curve.model.name == "vant-hoff"
    assert set(choice.skipped) == {"apelblat", "polynomial"}
    with pytest.raises(FitError, match="no solubility model could be fitted"):
        choose_solubility_model(temps[:3], conc[:3], auto_candidates(), MASS)


@pytest.mark.parametrize(
    ("conc", "message"),
    [
        ([0.05, 0.06, -0.01, 0.09, 0.1], "must be positive"),
        ([0.05, 0.06, np.nan, 0.09, 0.1], "not a finite number"),
    ],
)
def test_bad_values_refused(conc, message):
    with pytest.raises(FitError, match=message):
        fit_solubility(np.linspace(290, 330, 5), np.array(conc), VantHoff(), MASS)


def test_lambda_h_needs_melting_point():
    from sensor.solubility import fittable_model

    with pytest.raises(FitError, match="melting point"):
        fittable_model("lambda-h")
    assert "lambda-h" not in [m.name for m in auto_candidates()]
    assert "lambda-h" in [m.name for m in auto_candidates(melt_temp_k=441.15)]


def test_lambda_h_fit_recovers_its_own_curve(rng):
    # Synthetic data from the lambda-h equation itself (a fact of the method).
    truth = np.array([0.05, 14000.0])
    model = LambdaH(melt_temp_k=441.15)
    temps = np.linspace(283.15, 343.15, 12)
    clean = _curve(model, truth, basis=MOLE).c_sat(temps)
    fit = fit_solubility(temps, clean * (1 + 0.003 * rng.standard_normal(12)), model, MOLE)
    np.testing.assert_allclose(fit.curve.c_sat(temps), clean, rtol=0.01)
