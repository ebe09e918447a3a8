"""The replay kernel agrees with the per-sample filterpy path (SoftSensor) to 1e-9 in every
state, on batches with every kind of fault, gaps, irregular times and both state layouts."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from sensor.batchfilter import (
    FLAG_STARTED,
    BatchArrays,
    KernelError,
    history_capacity,
    run_batches,
    run_per_sample,
)
from sensor.crystallizer import TEMP, ZETA0, ZETA3
from sensor.samples import Sample
from tests.synthetic import cooling_batch, demo_setup, with_faults


def _irregular(samples: list[Sample], rng: np.random.Generator) -> list[Sample]:
    """Drop a tenth of the samples at random: irregular sample times."""
    keep = rng.random(len(samples)) > 0.1
    keep[0] = True
    return [s for s, k in zip(samples, keep, strict=True) if k]


CASES = {
    "faults, delay 30 s": ({}, False, 30.0),
    "faults, irregular times": ({}, True, 30.0),
    "no delay": ({}, False, 0.0),
    "no growth scale": ({"estimate_growth_scale": False}, False, 30.0),
}


@pytest.mark.parametrize("case", list(CASES))
def test_kernel_agrees_with_filterpy_path(case, rng):
    model_change, irregular, delay = CASES[case]
    setup = demo_setup()
    if model_change:
        from sensor.shell.sitesensor import unit_setup
        from tests.synthetic import demo_site_and_zone

        site, zone = demo_site_and_zone()
        site = replace(site, model=replace(site.model, **model_change))
        setup = unit_setup(site, 0, zone)
    setup = replace(setup, measurements=replace(setup.measurements, analyzer_delay_s=delay))
    batches = []
    for _ in range(2):
        batch = cooling_batch(setup, rng, hours=0.75, bias=0.002, seed_at_s=600.0)
        samples = with_faults(batch.samples, rng)
        if irregular:
            samples = _irregular(samples, rng)
        batches.append(BatchArrays.from_samples(samples, setup))
    fused = run_batches(setup, batches)
    for arrays, kernel in zip(batches, fused, strict=True):
        started = _assert_agree(kernel, run_per_sample(setup, arrays))
        assert started.mean() > 0.9


def test_kernel_agrees_with_the_unmodified_filterpy_ukf(rng):
    """The per-sample path above runs filterpy's UKF with its per-sigma-point work compiled
    (``CrystallizerUKF``, checked against the unmodified one in ``tests/test_kalman_fast.py``);
    here the kernel is checked against ``filterpy.kalman.UnscentedKalmanFilter`` itself, with
    a gap that restarts the filter, on a faulty batch with the analyzer delayed 30 s."""
    setup = demo_setup()
    batch = cooling_batch(setup, rng, hours=0.5, bias=0.002, seed_at_s=600.0)
    samples = with_faults(batch.samples, rng)
    stale = setup.temp_rules.stale_after_s
    gap_end = next(k for k, s in enumerate(samples) if s.time_s > samples[900].time_s + 2 * stale)
    arrays = BatchArrays.from_samples(samples[:900] + samples[gap_end:], setup)
    (kernel,) = run_batches(setup, [arrays])
    started = _assert_agree(kernel, run_per_sample(setup, arrays, reference_filter=True))
    assert started.mean() > 0.8
    assert not started[900]  # the restart: the next accepted analyzer value starts it again


def _assert_agree(kernel, reference) -> np.ndarray:
    """The kernel's output equals the filterpy path's; returns where the filter ran."""
    assert not isinstance(kernel, Exception)
    assert not isinstance(reference, Exception)
    np.testing.assert_array_equal(kernel.reasons, reference.reasons)
    np.testing.assert_array_equal(kernel.flags, reference.flags)
    started = (kernel.flags & FLAG_STARTED) != 0
    # "agrees to 1e-9 in every state": absolute, on states of order 1e-3 to 300
    np.testing.assert_allclose(kernel.x[started], reference.x[started], rtol=0, atol=1e-9)
    np.testing.assert_allclose(kernel.var[started], reference.var[started], rtol=1e-7)
    np.testing.assert_allclose(
        kernel.cov_temp_conc[started], reference.cov_temp_conc[started], rtol=1e-6, atol=1e-18
    )
    np.testing.assert_allclose(kernel.conc_nis, reference.conc_nis, rtol=1e-7)
    return started


def test_a_gap_in_the_samples_restarts_the_filter_in_both_paths(rng):
    # A service that stalls (or a historian hole) leaves the model's forecast unchecked over the
    # gap; readings far from it would then be gated for good. A gap longer than the
    # temperature's staleness limit restarts the filter from the next readings, in both paths.
    setup = demo_setup()
    batch = cooling_batch(setup, rng, hours=0.75, bias=0.002, seed_at_s=600.0)
    samples = list(batch.samples)
    stale = setup.temp_rules.stale_after_s
    gap_end = next(k for k, s in enumerate(samples) if s.time_s > samples[1200].time_s + 2 * stale)
    samples = samples[:1200] + samples[gap_end:]
    arrays = BatchArrays.from_samples(samples, setup)
    (kernel,) = run_batches(setup, [arrays])
    started = _assert_agree(kernel, run_per_sample(setup, arrays))
    assert started[1199]
    assert not started[1200]  # stopped at the gap
    restart = 1200 + int(np.argmax(started[1200:]))
    assert restart - 1200 < 60  # and started again at the next analyzer value
    assert kernel.x[restart, TEMP] == pytest.approx(samples[restart].temp.value, abs=1e-9)


def test_kernel_threads_give_the_same_answer(rng):
    setup = demo_setup()
    batches = [
        BatchArrays.from_samples(
            cooling_batch(setup, rng, hours=0.25, seed_at_s=300.0).samples, setup
        )
        for _ in range(3)
    ]
    one = run_batches(setup, batches, threads=1)
    two = run_batches(setup, batches, threads=2)
    for a, b in zip(one, two, strict=True):
        np.testing.assert_array_equal(a.x, b.x)


def test_history_capacity_covers_the_delay_window():
    times = np.arange(0.0, 600.0, 1.0)
    assert history_capacity(times, 30.0, 60.0) >= 2 * 91


def test_kernel_reports_a_filter_that_fails(rng):
    setup = demo_setup()
    batch = cooling_batch(setup, rng, hours=0.1)
    arrays = BatchArrays.from_samples(batch.samples, setup)
    broken = replace(setup, measurements=replace(setup.measurements, temp_noise_std_k=1e-200))
    (result,) = run_batches(broken, [arrays])
    assert isinstance(result, KernelError)
    assert "covariance is not positive-definite" in str(result)


def test_replay_and_live_nis_states_agree_across_a_reset(rng):
    # The live SoftSensor starts a fresh NIS window whenever its filter is reset (a phase in
    # which the model does not hold); the replay's states must follow it, also after re-seeding.
    from sensor.consistency import NIS_STATES
    from sensor.shell.replay import outputs_of
    from sensor.softsensor import SoftSensor

    setup = demo_setup()
    batch = cooling_batch(setup, rng, hours=0.6, bias=0.002, seed_at_s=600.0)
    samples = list(batch.samples)
    for k in range(900, 1100):  # the charge is taken back to dissolving, then cooled again
        s = samples[k]
        samples[k] = Sample(s.time_s, s.temp, s.jacket_temp, s.conc, "dissolve")
    for k in range(1100, 1300):
        s = samples[k]
        samples[k] = Sample(s.time_s, s.temp, s.jacket_temp, s.conc, "cool-to-seed")
    sensor = SoftSensor(setup)
    live = [sensor.step(sample).nis_state for sample in samples]
    arrays = BatchArrays.from_samples(samples, setup)
    (out,) = run_batches(setup, [arrays])
    replayed = [NIS_STATES[c] for c in outputs_of(setup, arrays, out).nis_state]
    assert live[899] != "filling"
    assert live[900] == "filling"  # the reset shows
    assert "ok" in live[1700:]  # and the window filled again after re-seeding
    assert replayed == live


def test_a_dissolving_seed_keeps_the_moments_physical_in_both_paths(rng):
    # Seeded while 13 K above saturation (sigma about -0.3): the demo's dissolution constant
    # (4e-7 m/s) dissolves the 60 um seed within minutes. Left alone, the method of moments
    # carries the moments below zero (negative solids) in the model and in both filters; the
    # smooth stop in the model and the clamp on the mean keep them >= 0 in both, and the paths
    # still agree to 1e-9 (physical bound: moments of a size distribution are >= 0, Randolph
    # and Larson, Theory of Particulate Processes, 2nd ed., 1988, ch. 3).
    setup = demo_setup()
    batch = cooling_batch(
        setup,
        rng,
        hours=0.75,
        start_temp_c=55.0,
        saturation_temp_c=42.0,
        seed_at_s=300.0,
        cooling_k_per_min=0.1,
    )
    moments = slice(ZETA0, ZETA3 + 1)
    assert np.all(batch.truth[:, moments] >= 0.0)
    seeded = batch.truth[:, ZETA3] > 0.0
    assert seeded.any()
    assert batch.truth[-1, ZETA3] < 1e-3 * batch.truth[seeded, ZETA3].max()  # dissolved
    # the model conserves dissolved plus crystallised solute through the stop
    solute = batch.truth[:, 1] + batch.truth[:, ZETA3]
    assert np.ptp(solute[seeded.argmax() :]) < 1e-12
    arrays = BatchArrays.from_samples(batch.samples, setup)
    (kernel,) = run_batches(setup, [arrays])
    reference = run_per_sample(setup, arrays)
    started = _assert_agree(kernel, reference)
    assert started.mean() > 0.9
    for path in (kernel, reference):
        assert np.all(path.x[started][:, moments] >= 0.0)
