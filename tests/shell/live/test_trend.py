"""The live page's trend buffer: bounded whatever the step rate, every slice's lowest and
highest sigma kept, time order enforced; sessions that expire; the reports' dash patterns."""

from __future__ import annotations

import math

import matplotlib as mpl
import numpy as np
import pytest

from sensor.shell.live.auth import MAX_SESSIONS, Sessions, csrf_ok
from sensor.shell.live.errors import LivePageError
from sensor.shell.live.trend import SIGMA, TREND_FIELDS, TrendBuffer
from sensor.shell.report import style


def rows_of(time_s, sigma):
    rows = np.full((len(time_s), len(TREND_FIELDS)), np.nan)
    rows[:, 0] = time_s
    rows[:, SIGMA] = sigma
    return rows


def test_the_buffer_stays_bounded_and_keeps_each_slices_extremes(rng):
    # Synthetic data: a day at one step per second into a 4 h window of 40 points; this tests
    # the method (min-max decimation, common practice for process trends), not a source.
    window_s, points = 4 * 3600.0, 40
    buffer = TrendBuffer(window_s, points)
    time_s = 1.7e9 + np.arange(86_400.0)
    sigma = np.cumsum(rng.normal(0.0, 1e-3, len(time_s)))
    sigma[80_000] += 0.5  # a short peak inside the last window
    sigma[80_500:80_520] = np.nan  # no estimate for 20 s
    for row in rows_of(time_s, sigma):
        buffer.add(row)
        assert len(buffer) <= buffer.max_rows == points + 3
    kept = buffer.rows()
    assert kept[-1, 0] == time_s[-1]
    assert kept[0, 0] >= time_s[-1] - window_s
    assert np.all(np.diff(kept[:, 0]) >= 0.0)
    slice_s = window_s / (points // 2)
    assert buffer.slice_s == slice_s
    for index in np.unique(np.floor(kept[:, 0] / slice_s)):
        inside = np.floor(time_s / slice_s) == index
        shown = np.floor(kept[:, 0] / slice_s) == index
        if kept[shown, 0].min() > time_s[inside].min():
            continue  # the oldest slice: partly past the window, so partly dropped
        assert np.nanmax(kept[shown, SIGMA]) == np.nanmax(sigma[inside])
        assert np.nanmin(kept[shown, SIGMA]) == np.nanmin(sigma[inside])
    assert np.nanmax(kept[:, SIGMA]) == sigma[80_000]


def test_a_slice_without_sigma_keeps_its_last_row_and_closing_returns_rows():
    buffer = TrendBuffer(100.0, 4)  # slices of 50 s
    assert len(buffer.add(rows_of([0.0], [math.nan])[0])) == 0
    buffer.add(rows_of([10.0], [math.nan])[0])
    closed = buffer.add(rows_of([60.0], [0.1])[0])
    assert closed[:, 0].tolist() == [10.0]
    assert buffer.open_rows()[:, 0].tolist() == [60.0]


def test_time_must_not_go_back():
    buffer = TrendBuffer(100.0, 4)
    buffer.add(rows_of([10.0], [0.0])[0])
    buffer.add(rows_of([10.0], [0.1])[0])  # the same time again is accepted
    with pytest.raises(LivePageError, match=r"time 9\.000 s goes back from the last one"):
        buffer.add(rows_of([9.0], [0.0])[0])
    with pytest.raises(LivePageError, match="not a number"):
        buffer.add(rows_of([math.nan], [0.0])[0])
    with pytest.raises(ValueError, match="points must be at least 4"):
        TrendBuffer(100.0, 3)


def test_sessions_expire_end_and_are_bounded():
    now = [0.0]
    sessions = Sessions(60.0, clock=lambda: now[0])
    token, session = sessions.open("shift-a", "operator")
    assert sessions.find(token) == session
    assert csrf_ok(session, session.csrf)
    assert not csrf_ok(session, session.csrf[:-1] + "x")
    assert not csrf_ok(session, None)
    assert sessions.find("forged") is None
    assert sessions.find(None) is None
    now[0] = 60.0
    assert sessions.find(token) is None  # expired
    token, _session = sessions.open("shift-a", "operator")
    sessions.close(token)
    assert sessions.find(token) is None
    for _ in range(MAX_SESSIONS + 5):
        sessions.open("eng-b", "viewer")
    assert len(sessions) == MAX_SESSIONS


def test_dash_patterns_are_matplotlibs():
    # Reference: matplotlib's own default rcParams (the reports draw with them).
    defaults = mpl.rc_params()
    for name, key in (("--", "dashed"), ("-.", "dashdot"), (":", "dotted")):
        assert style.DASH_PATTERNS[name] == tuple(defaults[f"lines.{key}_pattern"])
    assert style.svg_dasharray(style.ESTIMATE) == "none"
    assert style.svg_dasharray(style.METASTABLE_LIMIT) == "5.92 2.56"
