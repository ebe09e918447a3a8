"""Hand-made batch views for the tests of the envelope and the good-batch criterion."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from sensor.shell.replay import BatchSummary
from sensor.shell.report.view import AdvisorTrack, AlarmMark, AnalyzerPoints, BatchView

SUMMARY = BatchSummary(
    batch="X",
    file="x.csv",
    unit="CR-301",
    samples=0,
    rejected=0,
    rejected_by_reason={},
    duration_s=3600.0,
    peak_sigma=0.1,
    peak_sigma_timestamp=None,
    time_above_limit_s=0.0,
    sigma_integral_s=100.0,
    final_sigma=0.0,
    final_yield=0.5,
    final_yield_kg=10.0,
    final_analyzer_bias=0.0,
    nis_ok_fraction=0.95,
)


def make_view(
    batch: str,
    temp_c,
    sigma,
    *,
    conc=None,
    conc_std=1e-5,
    seeded=True,
    step_s: float = 10.0,
    alarms: tuple[AlarmMark, ...] | None = None,
    **summary_changes,
) -> BatchView:
    """A view whose path is ``temp_c`` and ``sigma`` (one sample every ``step_s``)."""
    temp_c = np.asarray(temp_c, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    n = len(temp_c)
    empty = np.array([])
    no = np.array([], dtype=bool)
    advisor = None
    if alarms is not None:
        advisor = AdvisorTrack(empty, empty, alarms, "test")
    return BatchView(
        batch=batch,
        unit="CR-301",
        source="test",
        start_timestamp="2026-03-14T06:00:00.000Z",
        samples=n,
        summary=replace(SUMMARY, batch=batch, samples=n, **summary_changes),
        time_s=np.arange(n) * step_s,
        temp_c=temp_c,
        temp_std_k=np.full(n, 0.01),
        jacket_temp_c=temp_c - 5.0,
        conc=np.full(n, 0.1) if conc is None else np.asarray(conc, dtype=float),
        conc_std=np.full(n, conc_std),
        sigma=sigma,
        sigma_std=np.full(n, 0.005),
        sigma_limit=np.full(n, 0.2),
        seeded=np.full(n, seeded, dtype=bool),
        analyzer=AnalyzerPoints(empty, empty, empty, no, no),
        phases=(),
        seed=None,
        peak=None,
        advisor=advisor,
    )
