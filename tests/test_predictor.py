"""The sigma predictor for the advisor: agrees with the model run alone when there is no
uncertainty, widens with uncertainty and horizon, and refuses bad paths."""

from __future__ import annotations

import numpy as np
import pytest

from sensor.crystallizer import CONC, TEMP, ZETA0, ZETA3, c_sat_from_table, step
from sensor.predictor import ForecastError, SigmaPredictor
from tests.synthetic import demo_setup


@pytest.fixture(scope="module")
def setup():
    return demo_setup()


def _state(setup):
    x = np.zeros(setup.model.layout.size)
    x[TEMP] = 320.0
    x[CONC] = 1.1 * float(setup.zone.solubility.c_sat(320.0))
    x[ZETA0 : ZETA3 + 1] = setup.seed_zeta
    x[6] = 1.0
    return x


def test_mean_follows_the_model_on_a_hold(setup):
    # A hold at the current temperature: the prescribed path is the model's own trajectory with
    # the jacket at the reactor temperature, so the forecast's mean (tiny covariance) equals the
    # model stepped on its own.
    x = _state(setup)
    predictor = SigmaPredictor(setup.model, setup.tuning, setup.zone.solubility, step_s=10.0)
    times = np.array([0.0, 300.0, 600.0])
    forecast = predictor(x, np.diag(np.full(x.size, 1e-24)), times, np.full(3, 320.0))
    model = setup.model
    alone = step(x, 600.0, 320.0, model.params, model.table)
    # the predictor steps 10 s, the model 1 s: Euler's first-order difference is small
    c_sat, _ = c_sat_from_table(320.0, model.params, model.table)
    assert forecast.sigma[-1] == pytest.approx(alone[CONC] / c_sat - 1.0, rel=2e-3)
    assert forecast.sigma[0] == pytest.approx(0.1, rel=1e-9)


def test_band_widens_with_horizon_and_includes_the_curve(setup):
    x = _state(setup)
    predictor = SigmaPredictor(setup.model, setup.tuning, setup.zone.solubility)
    P = np.diag(np.full(x.size, 1e-10))
    P[6, 6] = 0.09
    times = np.arange(0.0, 1201.0, 60.0)
    temps = 320.0 - 0.5 / 60.0 * times
    forecast = predictor(x, P, times, temps)
    assert np.all(np.diff(forecast.sigma_std[1:]) > 0.0)
    curve = setup.zone.solubility
    floor = forecast.conc / curve.c_sat(temps) ** 2 * curve.c_sat_std(temps)
    assert np.all(forecast.sigma_std >= floor)


@pytest.mark.parametrize(
    ("times", "temps", "message"),
    [
        ([0.0, 10.0, 5.0], [320.0] * 3, "must start at 0 or later and increase"),
        ([0.0, 10.0], [320.0, np.nan], "not finite"),
        ([0.0, 10.0], [320.0], "one length"),
    ],
)
def test_bad_paths_are_refused(setup, times, temps, message):
    predictor = SigmaPredictor(setup.model, setup.tuning, setup.zone.solubility)
    x = _state(setup)
    with pytest.raises(ForecastError, match=message):
        predictor(x, np.eye(x.size) * 1e-12, times, temps)


def test_bound_predictor_answers_the_controllers_protocol(setup):
    # controller.protocols.SigmaPredictor: predict_sigma(times (n,), paths (m, n)) -> (m, n) x 2,
    # each row what the one-path forecast gives.
    x = _state(setup)
    P = np.diag(np.full(x.size, 1e-8))
    P[6, 6] = 0.01
    predictor = SigmaPredictor(setup.model, setup.tuning, setup.zone.solubility, step_s=30.0)
    times = np.arange(30.0, 1201.0, 30.0)
    paths = 320.0 - np.array([0.2, 0.5, 1.0])[:, None] / 60.0 * times
    mean, std = predictor.bind(x, P).predict_sigma(times, paths)
    assert mean.shape == std.shape == (3, times.size)
    for row, path in enumerate(paths):
        one = predictor(x, P, times, path)
        np.testing.assert_allclose(mean[row], one.sigma, rtol=1e-12)
        np.testing.assert_allclose(std[row], one.sigma_std, rtol=1e-12)
    assert np.all(mean[2, -5:] > mean[0, -5:])  # faster cooling, more supersaturation
