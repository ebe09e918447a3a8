r"""The replay kernel: the soft sensor's validation and UKF for many batches in one compiled call.

It applies, sample by sample, exactly what :class:`sensor.softsensor.SoftSensor` does with
filterpy's ``UnscentedKalmanFilter`` (same rules, same sigma points and weights, same order of
predicts and updates, same re-filtering for the analyzer's delay; ``tests/test_batchfilter.py``
holds the two to 1e-9 in every state), but fused into one numba kernel per batch:

- the model, the process noise, the UKF's sums and the validation rules are the very functions
  the live path calls (:mod:`sensor.crystallizer`, :mod:`sensor.kalman`,
  :mod:`sensor.unscented`, :mod:`sensor.validation`), inlined;
- the two sigma points that differ from the mean only in the analyzer bias (the last state, whose
  row of the Cholesky factor has a single entry) are not propagated: the model ignores the bias,
  so their propagation equals the mean's, bit for bit;
- sigma points share the mean's temperature and concentration in all but the first two
  directions, so the kinetics (the logarithms and powers) are computed for five of them
  (:func:`sensor.crystallizer.step_points`), bit for bit as the per-point calls would;
- the measurements are scalar and linear, so the update is the closed form, to which
  filterpy's sigma-point sums are equal up to rounding (no second Cholesky factor per step);
- batches are independent, so :func:`filter_batches` can spread them over threads.

It records, per sample, the state, its variances and the temperature-concentration covariance
(what :func:`sensor.outputs.estimates` needs), the reason for each reading, the analyzer update's
NIS and the health flags; the full covariance of millions of samples is not kept.

Only the UKF is fused; an EKF site replays through the per-sample path.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

import numba
import numpy as np

from sensor.crystallizer import CONC, TEMP, ZETA0, stop_moments
from sensor.errors import SigmatrackError
from sensor.kalman import (
    initial_state,
    initial_vector,
    measurement_rows,
    merwe_weights,
    noise_from_rates,
    noise_vector,
    seed_covariance,
    widen,
)
from sensor.numerics import FloatArray
from sensor.samples import GOOD, Reading, Sample, severity
from sensor.softsensor import SoftSensor, UnitSetup
from sensor.unscented import (
    bias_pair,
    linear_innovation,
    linear_update_into,
    propagate_into,
    sigma_points_into,
    unscented_moments_into,
)
from sensor.validation import N_STATE, R_STALE, check_reading

# Flags recorded per sample (bits of ``flags``).
FLAG_STARTED, FLAG_SEEDED, FLAG_WIDENED = 1, 2, 4
FLAG_TEMP_STALE, FLAG_JACKET_STALE, FLAG_CONC_STALE = 8, 16, 32

# Phase codes of BatchArrays.seeded_phase.
PHASE_NOT_ESTIMATING, PHASE_UNSEEDED, PHASE_SEEDED = 0, 1, 2

# Signals, in the order of the reading arrays.
SIGNAL_TEMP, SIGNAL_JACKET, SIGNAL_CONC = 0, 1, 2

# Reason codes the kernel writes besides the validation rules' (sensor.validation.Reason).
_GATED, _BEFORE_HISTORY, _MISSING = 9, 10, 11

# Error codes the kernel returns.
ERROR_NONE, ERROR_NOT_PD, ERROR_NOT_FINITE, ERROR_HISTORY_FULL = 0, 1, 2, 3


class KernelSetup(NamedTuple):
    """Everything the kernel needs besides the data, packed by :func:`kernel_setup` (a named
    tuple of arrays and numbers, which numba passes to compiled code)."""

    params: FloatArray
    table: FloatArray
    noise: FloatArray
    init: FloatArray
    seed_zeta: FloatArray
    seed_cov: FloatArray
    seed_load: float
    wm: FloatArray
    wc: FloatArray
    spread: float
    """:math:`n + \\lambda` of the sigma points"""
    h_temp: FloatArray
    h_conc: FloatArray
    """the measurement rows: reactor temperature, analyzer (concentration plus bias)"""
    r_temp: float
    r_conc: float
    gate_nis: float
    max_consecutive_gated: int
    delay_s: float
    history_margin_s: float
    rules: FloatArray
    """(3, N_RULES): the temperature's, jacket's and analyzer's validation rules"""


def kernel_setup(setup: UnitSetup) -> KernelSetup:
    """Pack a unit's setup for the kernel (UKF only)."""
    tuning = setup.tuning
    if tuning.kind != "ukf":
        raise ValueError("the replay kernel runs the UKF; replay an EKF through SoftSensor")
    model = setup.model
    n = model.layout.size
    wm, wc = merwe_weights(n, tuning.sigma_alpha, tuning.sigma_beta, tuning.sigma_kappa)
    lam = tuning.sigma_alpha**2 * (n + tuning.sigma_kappa) - n
    h_temp, h_conc = measurement_rows(model.layout)
    return KernelSetup(
        params=model.params,
        table=model.table,
        noise=noise_vector(tuning, model.layout.estimate_growth_scale),
        init=initial_vector(tuning),
        seed_zeta=np.asarray(setup.seed_zeta, dtype=float),
        seed_cov=seed_covariance(np.asarray(setup.seed_zeta, dtype=float), tuning, n),
        seed_load=float(setup.seed_zeta[3]),
        wm=wm,
        wc=wc,
        spread=float(n + lam),
        h_temp=h_temp,
        h_conc=h_conc,
        r_temp=setup.measurements.temp_noise_std_k**2,
        r_conc=setup.measurements.conc_noise_std**2,
        gate_nis=tuning.gate_nis,
        max_consecutive_gated=tuning.max_consecutive_gated,
        delay_s=setup.measurements.analyzer_delay_s,
        history_margin_s=tuning.history_margin_s,
        rules=np.vstack(
            [setup.temp_rules.vector(), setup.jacket_rules.vector(), setup.conc_rules.vector()]
        ),
    )


class KernelOutput(NamedTuple):
    """What the kernel records per sample (arrays over all samples of all batches)."""

    x: FloatArray
    var: FloatArray
    cov_temp_conc: FloatArray
    reasons: np.ndarray
    """(N, 3) int8: the temperature's, jacket's and analyzer's :class:`Reason`"""
    conc_nis: FloatArray
    flags: np.ndarray
    jacket_temp_k: FloatArray

    @classmethod
    def empty(cls, samples: int, n: int) -> KernelOutput:
        return cls(
            x=np.full((samples, n), np.nan),
            var=np.full((samples, n), np.nan),
            cov_temp_conc=np.full(samples, np.nan),
            reasons=np.zeros((samples, 3), dtype=np.int8),
            conc_nis=np.full(samples, np.nan),
            flags=np.zeros(samples, dtype=np.int8),
            jacket_temp_k=np.full(samples, np.nan),
        )


class Workspace(NamedTuple):
    """Scratch arrays of one batch's run (allocated once per batch, not per step)."""

    x: FloatArray
    P: FloatArray
    sig: FloatArray
    sigf: FloatArray
    scaled: FloatArray
    chol: FloatArray
    q: FloatArray
    slope: FloatArray
    h: FloatArray
    gain: FloatArray
    skip: np.ndarray
    mean_slope: FloatArray


class History(NamedTuple):
    """The filter's recent events (``CrystallizerFilter._events``) as arrays: time [s], jacket
    input from then on [K], temperature and analyzer values applied (NaN: none), seeding, and the
    posterior after each."""

    t: FloatArray
    u: FloatArray
    temp: FloatArray
    conc: FloatArray
    seed: np.ndarray
    x: FloatArray
    P: FloatArray


@numba.njit(cache=True)
def _history(capacity: int, n: int) -> History:
    return History(
        np.empty(capacity),
        np.empty(capacity),
        np.empty(capacity),
        np.empty(capacity),
        np.zeros(capacity, dtype=np.bool_),
        np.empty((capacity, n)),
        np.empty((capacity, n, n)),
    )


@numba.njit(cache=True)
def _set_event(
    h: History, e: int, t: float, u: float, temp: float, conc: float, seed: bool
) -> None:
    h.t[e] = t
    h.u[e] = u
    h.temp[e] = temp
    h.conc[e] = conc
    h.seed[e] = seed


@numba.njit(cache=True)
def _workspace(n: int) -> Workspace:
    points = 2 * n + 1
    return Workspace(
        np.empty(n),
        np.empty((n, n)),
        np.empty((points, n)),
        np.empty((points, n)),
        np.empty((n, n)),
        np.empty((n, n)),
        np.empty((n, n)),
        np.empty(n),
        np.empty(points),
        np.empty(n),
        bias_pair(n),
        np.empty(n),
    )


@numba.njit(cache=True)
def _predict(dt, jacket, s: KernelSetup, w: Workspace) -> bool:
    """filterpy's UKF ``predict`` on ``w.x``, ``w.P`` (:mod:`sensor.unscented`): draw and
    propagate the sigma points, unscented transform plus Q."""
    x, P = w.x, w.P
    if not sigma_points_into(x, P, s.spread, w.scaled, w.chol, w.sig):
        return False
    # the bias-only pair is not propagated: its propagation is the mean's (module docstring)
    propagate_into(w.sig, w.skip, dt, jacket, s.params, s.table, w.sigf, w.slope, w.mean_slope)
    w.q[:, :] = 0.0
    if dt > 0.0:  # Q from the mean's rates, as process_noise computes it
        noise_from_rates(w.mean_slope, dt, s.noise, w.q)
    unscented_moments_into(w.sigf, s.wm, s.wc, w.q, x, P)
    stop_moments(x)  # as CrystallizerFilter._predict does, before the sigma points are drawn again
    return True


@numba.njit(cache=True)
def _update(z: float, hrow: FloatArray, r: float, w: Workspace) -> None:
    """filterpy's UKF ``update`` of ``w.x``, ``w.P`` for one scalar, linear measurement
    :math:`z = h^\\top x + v`, in closed form (:func:`sensor.unscented.linear_update_into`)."""
    y, var = linear_innovation(w.x, w.P, hrow, z, r)
    linear_update_into(w.x, w.P, hrow, y, var, w.gain)
    stop_moments(w.x)  # as CrystallizerFilter._update does


@numba.njit(cache=True)
def _seed(s: KernelSetup, w: Workspace) -> bool:
    for k in range(4):
        w.x[ZETA0 + k] += s.seed_zeta[k]
    w.P[:, :] += s.seed_cov
    return True


@numba.njit(cache=True)
def _run_event(e: int, h: History, s: KernelSetup, w: Workspace) -> tuple[int, bool]:
    """Process event ``e`` from event ``e - 1``'s posterior (``CrystallizerFilter._run``).
    Returns (error code, temperature gated)."""
    x, P = w.x, w.P
    x[:] = h.x[e - 1]
    P[:, :] = h.P[e - 1]
    if not _predict(h.t[e] - h.t[e - 1], h.u[e - 1], s, w):
        return ERROR_NOT_PD, False
    if h.seed[e] and not _seed(s, w):
        return ERROR_NOT_PD, False
    gated = False
    if not math.isnan(h.temp[e]):
        y, var = linear_innovation(x, P, s.h_temp, h.temp[e], s.r_temp)
        if y * y / var > s.gate_nis:
            gated = True
        else:
            _update(h.temp[e], s.h_temp, s.r_temp, w)
    if not math.isnan(h.conc[e]):
        _update(h.conc[e], s.h_conc, s.r_conc, w)
    for j in range(x.shape[0]):
        if not math.isfinite(x[j]):
            return ERROR_NOT_FINITE, gated
    h.x[e] = x
    h.P[e] = P
    return ERROR_NONE, gated


@numba.njit(cache=True)
def _rerun(first: int, count: int, h: History, s: KernelSetup, w: Workspace) -> int:
    """Re-run events ``first`` to ``count - 1``; the first error code (or ``ERROR_NONE``)."""
    for e in range(first, count):
        error, _ = _run_event(e, h, s, w)
        if error != ERROR_NONE:
            return error
    return ERROR_NONE


@numba.njit(cache=True)
def _move(h: History, to: int, source: int) -> None:
    h.t[to] = h.t[source]
    h.u[to] = h.u[source]
    h.temp[to] = h.temp[source]
    h.conc[to] = h.conc[source]
    h.seed[to] = h.seed[source]
    h.x[to] = h.x[source]
    h.P[to] = h.P[source]


@numba.njit(cache=True)
def _shift(first: int, count: int, h: History) -> int:
    """Drop the ``first`` oldest events; the new count."""
    for e in range(count - first):
        _move(h, e, e + first)
    return count - first


@numba.njit(cache=True)
def _insert(at: int, count: int, h: History) -> int:
    """Open a slot at index ``at``, moving the later events up by one; the new count."""
    for e in range(count, at, -1):
        _move(h, e, e - 1)
    return count + 1


@numba.njit(cache=True)
def filter_batch(
    time_s,
    values,
    severities,
    source_s,
    present,
    seeded_phase,
    n: int,
    s: KernelSetup,
    capacity: int,
    out_x,
    out_var,
    out_ctc,
    out_reasons,
    out_nis,
    out_flags,
    out_jacket,
) -> tuple[int, int]:
    """Run one batch (``SoftSensor.step`` on every sample). Arrays are the batch's: ``time_s``
    (N,) [s]; ``values``, ``severities``, ``source_s``, ``present`` (3, N) for temperature,
    jacket and analyzer; ``seeded_phase`` (N,) the phase code (:class:`BatchArrays`). Returns
    (error code,
    sample index); ``ERROR_NONE`` and -1 when all went well."""
    samples = time_s.shape[0]
    h = _history(capacity, n)
    count = 0
    base = 0
    w = _workspace(n)
    x, P = w.x, w.P
    states = np.zeros((3, N_STATE))
    accepted = np.full(3, math.nan)
    accepted_at = np.full(3, -math.inf)
    seeded = False
    gated_run = 0
    reasons = np.empty(3, dtype=np.int64)
    for k in range(samples):
        t = time_s[k]
        reasons[:] = _MISSING
        for signal in range(3):
            if present[signal, k]:
                code = check_reading(
                    states[signal],
                    t,
                    values[signal, k],
                    severities[signal, k],
                    source_s[signal, k],
                    s.rules[signal],
                )
                reasons[signal] = code
                if code == 0:
                    accepted[signal] = values[signal, k]
                    accepted_at[signal] = t
        # a gap in the samples longer than the temperature's staleness limit: SoftSensor's
        # restart (the model's forecast over the gap went unchecked)
        gap = k > 0 and t - time_s[k - 1] > s.rules[SIGNAL_TEMP, R_STALE]
        if (seeded_phase[k] == PHASE_NOT_ESTIMATING or gap) and count > 0:
            count, base, seeded, gated_run = 0, 0, False, 0  # SoftSensor's reset
        entering_seed = not seeded and seeded_phase[k] == PHASE_SEEDED and s.seed_load > 0.0
        nis = math.nan
        widened = False
        started = count > 0
        jacket = accepted[SIGNAL_JACKET]
        if not started:
            if (
                not gap
                and seeded_phase[k] != PHASE_NOT_ESTIMATING
                and reasons[SIGNAL_TEMP] == 0
                and reasons[SIGNAL_CONC] == 0
                and not math.isnan(jacket)
            ):
                x0, p0 = initial_state(accepted[SIGNAL_TEMP], accepted[SIGNAL_CONC], s.init, n)
                _set_event(h, 0, t, jacket, math.nan, math.nan, False)
                h.x[0] = x0
                h.P[0] = p0
                count = 1
                started = True
                if entering_seed:
                    _set_event(h, 1, t, jacket, math.nan, math.nan, True)
                    count = 2
                    error, _ = _run_event(1, h, s, w)
                    if error != ERROR_NONE:
                        return error, k
                    seeded = True
        else:
            if count >= capacity:
                count = _shift(base, count, h)
                base = 0
                if count >= capacity:
                    return ERROR_HISTORY_FULL, k
            temp_z = accepted[SIGNAL_TEMP] if reasons[SIGNAL_TEMP] == 0 else math.nan
            _set_event(h, count, t, jacket, temp_z, math.nan, entering_seed)
            count += 1
            error, gated = _run_event(count - 1, h, s, w)
            if error != ERROR_NONE:
                return error, k
            seeded = seeded or entering_seed
            if gated:
                reasons[SIGNAL_TEMP] = _GATED
            # prune (CrystallizerFilter._prune)
            keep_from = t - s.delay_s - s.history_margin_s
            # (the dropped events stay in the arrays until they are needed: ``base`` is the first
            # kept one, and the arrays are compacted only when full)
            while base + 1 < count and h.t[base + 1] <= keep_from:
                base += 1
            if reasons[SIGNAL_CONC] == 0:
                drawn = t - s.delay_s
                anchor = -1
                for e in range(count - 1, base - 1, -1):
                    if h.t[e] <= drawn:
                        anchor = e
                        break
                if anchor < 0:
                    reasons[SIGNAL_CONC] = _BEFORE_HISTORY
                else:
                    x[:] = h.x[anchor]
                    P[:, :] = h.P[anchor]
                    if not _predict(drawn - h.t[anchor], h.u[anchor], s, w):
                        return ERROR_NOT_PD, k
                    force = gated_run >= s.max_consecutive_gated
                    if force:
                        widen(P, x, s.init)
                        widened = True
                    z = accepted[SIGNAL_CONC]
                    y, var = linear_innovation(x, P, s.h_conc, z, s.r_conc)
                    nis = y * y / var
                    if nis > s.gate_nis and not force:
                        gated_run += 1
                        reasons[SIGNAL_CONC] = _GATED
                    else:
                        gated_run = 0
                        _update(z, s.h_conc, s.r_conc, w)
                        if count >= capacity:
                            kept = _shift(base, count, h)
                            anchor -= count - kept
                            count, base = kept, 0
                            if count >= capacity:
                                return ERROR_HISTORY_FULL, k
                        count = _insert(anchor + 1, count, h)
                        slot = anchor + 1
                        _set_event(h, slot, drawn, h.u[anchor], math.nan, z, False)
                        h.x[slot] = x
                        h.P[slot] = P
                        error = _rerun(slot + 1, count, h, s, w)
                        if error != ERROR_NONE:
                            return error, k
        for signal in range(3):
            out_reasons[k, signal] = reasons[signal]
        out_nis[k] = nis
        flags = 0
        if started:
            last = count - 1
            out_x[k] = h.x[last]
            for j in range(n):
                out_var[k, j] = h.P[last, j, j]
            out_ctc[k] = h.P[last, TEMP, CONC]
            out_jacket[k] = jacket
            flags |= FLAG_STARTED
        if seeded:
            flags |= FLAG_SEEDED
        if widened:
            flags |= FLAG_WIDENED
        if t - accepted_at[SIGNAL_TEMP] > s.rules[SIGNAL_TEMP, R_STALE]:
            flags |= FLAG_TEMP_STALE
        if t - accepted_at[SIGNAL_JACKET] > s.rules[SIGNAL_JACKET, R_STALE]:
            flags |= FLAG_JACKET_STALE
        if t - accepted_at[SIGNAL_CONC] > s.rules[SIGNAL_CONC, R_STALE]:
            flags |= FLAG_CONC_STALE
        out_flags[k] = flags
    return ERROR_NONE, -1


class FlatBatches(NamedTuple):
    """Many batches' :class:`BatchArrays` end to end; batch ``b`` is samples
    ``offsets[b]:offsets[b + 1]``."""

    offsets: np.ndarray
    time_s: FloatArray
    values: FloatArray
    severities: np.ndarray
    source_s: FloatArray
    present: np.ndarray
    seeded_phase: np.ndarray


@numba.njit(cache=True)
def _filter_one(b, d: FlatBatches, n, s, capacity, out: KernelOutput, errors) -> None:
    lo, hi = d.offsets[b], d.offsets[b + 1]
    code, at = filter_batch(
        d.time_s[lo:hi], d.values[:, lo:hi], d.severities[:, lo:hi], d.source_s[:, lo:hi],
        d.present[:, lo:hi], d.seeded_phase[lo:hi], n, s, capacity[b], out.x[lo:hi],
        out.var[lo:hi], out.cov_temp_conc[lo:hi], out.reasons[lo:hi], out.conc_nis[lo:hi],
        out.flags[lo:hi], out.jacket_temp_k[lo:hi],
    )  # fmt: skip
    errors[b, 0] = code
    errors[b, 1] = at


@numba.njit(cache=True)
def filter_batches(d: FlatBatches, n, s, capacity, out: KernelOutput, errors) -> None:
    """:func:`filter_batch` on every batch, one after the other; ``errors`` (batches, 2)
    receives each batch's error code and sample index."""
    for b in range(d.offsets.shape[0] - 1):
        _filter_one(b, d, n, s, capacity, out, errors)


@numba.njit(cache=True, parallel=True)
def filter_batches_threaded(d: FlatBatches, n, s, capacity, out: KernelOutput, errors) -> None:
    """:func:`filter_batches` with the batches spread over numba's threads (compiled on first
    use, which takes a while)."""
    for b in numba.prange(d.offsets.shape[0] - 1):
        _filter_one(b, d, n, s, capacity, out, errors)


class BatchArrays(NamedTuple):
    """One batch's samples as arrays (what a replay reader builds, in sigmatrack's units).

    Attributes
    ----------
    time_s : (N,) sample times [s], increasing
    values : (3, N) temperature [K], jacket temperature [K], analyzer [kg/kg]
    severities : (3, N) int8 StatusCode severities (:class:`sensor.samples.Severity`)
    source_s : (3, N) source times [s], NaN when unknown
    present : (3, N) bool, a reading arrived
    seeded_phase : (N,) int8 phase code: ``PHASE_NOT_ESTIMATING`` (the model does not hold, e.g.
        undissolved charge while heating: the filter stops), ``PHASE_UNSEEDED`` (a clear
        solution, or the phase is not known) or ``PHASE_SEEDED`` (the seed is in)
    """

    time_s: FloatArray
    values: FloatArray
    severities: np.ndarray
    source_s: FloatArray
    present: np.ndarray
    seeded_phase: np.ndarray

    @classmethod
    def from_samples(cls, samples: Sequence[Sample], setup: UnitSetup) -> BatchArrays:
        """Arrays of a list of samples (tests and small replays)."""
        count = len(samples)
        values = np.full((3, count), np.nan)
        severities = np.zeros((3, count), dtype=np.int8)
        source = np.full((3, count), np.nan)
        present = np.zeros((3, count), dtype=np.bool_)
        for k, sample in enumerate(samples):
            for signal, reading in enumerate((sample.temp, sample.jacket_temp, sample.conc)):
                if reading is None:
                    continue
                present[signal, k] = True
                values[signal, k] = reading.value
                severities[signal, k] = severity(reading.status_code)
                if reading.source_time_s is not None:
                    source[signal, k] = reading.source_time_s
        return cls(
            time_s=np.array([sample.time_s for sample in samples], dtype=float),
            values=values,
            severities=severities,
            source_s=source,
            present=present,
            seeded_phase=np.array([phase_code(setup, s.phase) for s in samples], dtype=np.int8),
        )


def history_capacity(time_s: FloatArray, delay_s: float, margin_s: float) -> int:
    """Room for the kernel's history of a batch sampled at ``time_s`` [s]: the samples in the
    longest window of ``delay_s + margin_s`` (plus one), each possibly followed by an analyzer
    event, twice over, so that the arrays are compacted only now and then."""
    span = delay_s + margin_s
    ends = np.searchsorted(time_s, time_s + span, side="right")
    widest = int(np.max(ends - np.arange(len(time_s)))) if len(time_s) else 0
    return 4 * (widest + 2) + 8


class KernelError(SigmatrackError, ArithmeticError):
    """The kernel stopped on a batch (the covariance stopped being positive-definite, the state
    stopped being finite, or the history overflowed)."""

    def __init__(self, batch: int, code: int, sample: int) -> None:
        what = {
            ERROR_NOT_PD: "the covariance is not positive-definite",
            ERROR_NOT_FINITE: "the state is not finite",
            ERROR_HISTORY_FULL: "the filter's history overflowed",
        }[code]
        self.batch, self.code, self.sample = batch, code, sample
        super().__init__(f"batch {batch}, sample {sample}: {what}")


def run_batches(
    setup: UnitSetup, batches: Sequence[BatchArrays], threads: int = 1
) -> list[KernelOutput | KernelError]:
    """Run the soft sensor on many batches of one unit at once; one output (or the error that
    stopped it) per batch, in order."""
    s = kernel_setup(setup)
    n = setup.model.layout.size
    lengths = np.array([len(b.time_s) for b in batches], dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    total = int(offsets[-1])
    out = KernelOutput.empty(total, n)
    capacity = np.array(
        [history_capacity(b.time_s, s.delay_s, s.history_margin_s) for b in batches],
        dtype=np.int64,
    )
    errors = np.zeros((len(batches), 2), dtype=np.int64)
    if batches:
        flat = FlatBatches(
            offsets,
            np.concatenate([b.time_s for b in batches]),
            np.concatenate([b.values for b in batches], axis=1),
            np.concatenate([b.severities for b in batches], axis=1),
            np.concatenate([b.source_s for b in batches], axis=1),
            np.concatenate([b.present for b in batches], axis=1),
            np.concatenate([b.seeded_phase for b in batches]),
        )
        arguments = (flat, n, s, capacity, out, errors)
        if threads > 1:
            previous = numba.get_num_threads()
            numba.set_num_threads(min(threads, numba.config.NUMBA_NUM_THREADS))
            try:
                filter_batches_threaded(*arguments)
            finally:
                numba.set_num_threads(previous)
        else:
            filter_batches(*arguments)
    results: list[KernelOutput | KernelError] = []
    for b in range(len(batches)):
        lo, hi = int(offsets[b]), int(offsets[b + 1])
        if errors[b, 0] != ERROR_NONE:
            results.append(KernelError(b, int(errors[b, 0]), int(errors[b, 1])))
        else:
            results.append(KernelOutput(*(field[lo:hi] for field in out)))
    return results


def phase_code(setup: UnitSetup, phase: str | None) -> int:
    """The :class:`BatchArrays` phase code of a phase name (None: not known)."""
    if phase is None or phase == "":
        return PHASE_UNSEEDED
    if setup.estimating_phases is not None and phase not in setup.estimating_phases:
        return PHASE_NOT_ESTIMATING
    return PHASE_SEEDED if phase in setup.seeded_phases else PHASE_UNSEEDED


def to_samples(batch: BatchArrays, phase_names: tuple[str | None, str | None, str]) -> list[Sample]:
    """The samples of a batch's arrays (the per-sample path's input); ``phase_names`` gives a
    phase of each code."""
    samples = []
    for k, t in enumerate(batch.time_s):
        readings = []
        for signal in range(3):
            if not batch.present[signal, k]:
                readings.append(None)
                continue
            source = batch.source_s[signal, k]
            readings.append(
                Reading(
                    float(batch.values[signal, k]),
                    SEVERITY_CODES[int(batch.severities[signal, k])],
                    None if math.isnan(source) else float(source),
                )
            )
        phase = phase_names[int(batch.seeded_phase[k])]
        samples.append(Sample(float(t), *readings, phase=phase))
    return samples


SEVERITY_CODES = (GOOD, 0x40000000, 0x80000000)
"""A StatusCode of each severity (``Good``, ``Uncertain``, ``Bad``)."""


def run_per_sample(
    setup: UnitSetup, batch: BatchArrays, *, reference_filter: bool = False
) -> KernelOutput | SigmatrackError:
    """What :func:`run_batches` records, from :class:`SoftSensor` on filterpy (the reference
    path, and the one an EKF site replays through); ``reference_filter``: on the unmodified
    filterpy UKF (:class:`SoftSensor`)."""
    sensor = SoftSensor(setup, reference_filter=reference_filter)
    n = setup.model.layout.size
    out = KernelOutput.empty(len(batch.time_s), n)
    outside = sorted(setup.all_phases - (setup.estimating_phases or setup.all_phases))
    names = (outside[0] if outside else None, None, min(setup.seeded_phases, default="seed"))
    try:
        for k, sample in enumerate(to_samples(batch, names)):
            result = sensor.step(sample)
            out.reasons[k] = [result.temp, result.jacket_temp, result.conc]
            out.conc_nis[k] = result.conc_nis
            flags = 0
            if result.started:
                flags |= FLAG_STARTED
                out.x[k] = sensor.filter.x
                out.var[k] = np.diag(sensor.filter.P)
                out.cov_temp_conc[k] = sensor.filter.P[TEMP, CONC]
                out.jacket_temp_k[k] = sensor.jacket_temp_k
            flags |= FLAG_SEEDED if result.seeded else 0
            flags |= FLAG_WIDENED if result.widened else 0
            flags |= FLAG_TEMP_STALE if result.temp_stale else 0
            flags |= FLAG_JACKET_STALE if result.jacket_stale else 0
            flags |= FLAG_CONC_STALE if result.conc_stale else 0
            out.flags[k] = flags
    except SigmatrackError as error:
        return error
    return out
