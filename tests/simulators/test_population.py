"""The population balance: the analytic solution of pure growth, conservation, dissolution."""

from __future__ import annotations

from math import comb

import numpy as np
import pytest

from simulators.population import (
    SizeGrid,
    crystal_mass,
    growth_step,
    mean_size_m,
    moment,
    normal_counts,
)

MASS_FACTOR = 1310.0 * 0.45  # the demo's crystal density x volume shape factor [kg/m3]


def _advance(counts, grid, growth_m_per_s, time_s, courant=0.4):
    steps = int(np.ceil(abs(growth_m_per_s) * time_s / (courant * grid.width_m)))
    nu = growth_m_per_s * (time_s / steps) / grid.width_m
    faces = np.full(grid.n_classes + 1, nu)
    for _ in range(steps):
        counts = growth_step(counts, faces)
    return counts


def test_constant_growth_shifts_the_distribution_and_its_moments():
    # Randolph & Larson, Theory of Particulate Processes, 2nd ed. (1988), ch. 4: with constant
    # growth G and no nucleation, n(L, t) = n0(L - G t), so the moments obey
    # d mu_k / dt = k G mu_(k-1): mu_k(t) = sum_j C(k, j) (G t)^(k-j) mu_j(0).
    grid = SizeGrid(400, 800e-6)
    counts0 = normal_counts(grid, 0.002, 150e-6, 25e-6, MASS_FACTOR)
    growth, time_s = 5e-9, 36000.0  # 18 um/h for 10 h: a shift of 180 um
    counts = _advance(counts0, grid, growth, time_s)
    shift = growth * time_s
    mu0 = [moment(counts0, grid, k) for k in range(4)]
    for k in range(4):
        expected = sum(comb(k, j) * shift ** (k - j) * mu0[j] for j in range(k + 1))
        # mu0 is exact (flux form); the others carry the limited scheme's small numerical
        # diffusion: observed below 2e-5 relative on this grid, so 1e-4 has a margin of 5.
        assert moment(counts, grid, k) == pytest.approx(expected, rel=1e-12 if k == 0 else 1e-4)

    # The width is kept: the variance about the mean changes by under 1 % (0.1 % observed).
    def variance(x):
        m0, m1, m2 = (moment(x, grid, k) for k in range(3))
        return m2 / m0 - (m1 / m0) ** 2

    assert variance(counts) == pytest.approx(variance(counts0), rel=0.01)
    # The peak moves by G t (one cell = 2 um).
    peak_shift = grid.centres_m[np.argmax(counts)] - grid.centres_m[np.argmax(counts0)]
    assert peak_shift == pytest.approx(shift, abs=grid.width_m)
    # The limiter adds no new extrema and keeps counts non-negative.
    assert np.all(counts >= 0.0)
    assert np.count_nonzero(np.diff(np.sign(np.diff(counts[counts > 1e-6 * counts.max()])))) <= 2


def test_growth_conserves_the_number_of_crystals_exactly():
    grid = SizeGrid(200, 1e-3)
    counts = normal_counts(grid, 0.01, 300e-6, 50e-6, MASS_FACTOR)
    after = _advance(counts, grid, 3e-8, 3600.0)
    assert np.sum(after) == pytest.approx(np.sum(counts), rel=1e-13)


def test_dissolution_removes_the_fines_first():
    # Crystals shrink at one rate whatever their size: the smallest reach zero first. 80 um
    # dissolved off every crystal: the fines (40 +/- 8 um) are gone, the coarse (400 um) only
    # smaller; what is left of the fines is the scheme's smearing at L = 0.
    grid = SizeGrid(200, 1e-3)
    fines = normal_counts(grid, 0.001, 40e-6, 8e-6, MASS_FACTOR)
    coarse = normal_counts(grid, 0.01, 400e-6, 40e-6, MASS_FACTOR)
    after = _advance(fines + coarse, grid, -1e-8, 8000.0)
    small = grid.centres_m < 150e-6
    assert np.sum(after[small]) < 1e-3 * np.sum(fines)
    assert np.sum(after[~small]) == pytest.approx(np.sum(coarse), rel=1e-4)  # its far tail
    # The exact answer: every coarse crystal 80 um smaller (n(L, t) = n0(L + D t)).
    shrunk = np.clip(grid.centres_m - 80e-6, 0.0, None)
    exact = float(coarse @ shrunk**4) / float(coarse @ shrunk**3)
    assert mean_size_m(after, grid) == pytest.approx(exact, rel=1e-3)


def test_a_step_beyond_the_courant_limit_is_refused():
    with pytest.raises(ValueError, match=r"Courant number 0.6 above 0.5"):
        growth_step(np.ones(10), np.full(11, 0.6))


def test_normal_counts_hold_the_mass_asked_for():
    grid = SizeGrid(300, 1.5e-3)
    counts = normal_counts(grid, 3.0 / 1600.0, 60e-6, 15e-6, MASS_FACTOR)
    assert crystal_mass(counts, grid, MASS_FACTOR) == pytest.approx(3.0 / 1600.0, rel=1e-14)
    assert mean_size_m(counts, grid) == pytest.approx(
        # L43 of a normal distribution: (m4) / (m3) with m3 = mu^3 + 3 mu s^2,
        # m4 = mu^4 + 6 mu^2 s^2 + 3 s^4 (moments of the normal distribution, common knowledge)
        (60**4 + 6 * 60**2 * 15**2 + 3 * 15**4) / (60**3 + 3 * 60 * 15**2) * 1e-6,
        rel=2e-3,
    )
