"""The drawings' pieces: SVG made inlinable, the hull behind the phase diagram's band (against
scipy's Qhull), the band of a path that holds at one temperature, and series decimation."""

from __future__ import annotations

import re

import numpy as np
import pytest
from matplotlib.figure import Figure
from scipy.spatial import ConvexHull

from sensor.shell.report.figures import _hull, path_band
from sensor.shell.report.svg import inline_svg
from sensor.shell.report.view import keep_indices, phase_spans
from tests.shell.report.pages import external_references


def _figure() -> Figure:
    figure = Figure(figsize=(3, 2))
    ax = figure.add_subplot()
    ax.plot([1, 2, 3], [1, 4, 2], marker="o", label="a")
    ax.fill_between([1, 2, 3], [0, 1, 1], [2, 3, 3], alpha=0.3)
    ax.legend()
    ax.set_xlabel("temperature [°C]")
    return figure


def test_inline_svg_is_clean_and_its_ids_are_its_own():
    first, second = inline_svg(_figure(), "one", "a"), inline_svg(_figure(), "two", "b")
    for svg, prefix in ((first, "one"), (second, "two")):
        assert svg.startswith('<svg role="img" aria-label=')
        assert "<?xml" not in svg
        assert "DOCTYPE" not in svg
        assert "xmlns" not in svg
        assert "xlink:" not in svg
        assert external_references(svg) == []
        ids = re.findall(r'\bid="([^"]+)"', svg)
        assert ids
        assert all(i.startswith(f"{prefix}-") for i in ids)
        targets = re.findall(r'href="#([^"]+)"', svg) + re.findall(r"url\(#([^)]+)\)", svg)
        assert targets
        assert set(targets) <= set(ids)
    assert not set(re.findall(r'id="([^"]+)"', first)) & set(re.findall(r'id="([^"]+)"', second))
    assert "<title>a</title>" in first


def test_inline_svg_refuses_a_bad_prefix():
    with pytest.raises(ValueError, match=r"id prefix must be letters, digits and '-'; got '1 x'"):
        inline_svg(_figure(), "1 x", "a")


def test_hull_agrees_with_qhull(rng):
    """Reference: scipy.spatial.ConvexHull (Qhull; C. B. Barber, D. P. Dobkin, H. Huhdanpaa,
    "The Quickhull algorithm for convex hulls", ACM TOMS 22 (1996) 469-483)."""
    for _ in range(50):
        points = rng.normal(size=(8, 2)) * rng.uniform(0.1, 10.0, size=2)
        ours = _hull(points)
        reference = points[ConvexHull(points).vertices]
        assert {tuple(p) for p in ours} == {tuple(p) for p in reference}
        x, y = ours[:, 0], ours[:, 1]
        assert 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y) > 0.0  # counter-clockwise


def test_the_band_of_a_hold_has_area():
    # 5 samples at one temperature (a hold): two curves of temperature could not fill this
    x = np.full(5, 30.0)
    y = np.linspace(0.10, 0.09, 5)
    band = path_band(x, y, np.full(5, 0.02), np.full(5, 0.001), segments=10)
    assert band is not None
    assert band.contains_point((30.01, 0.095))
    assert not band.contains_point((30.05, 0.095))
    assert not band.contains_point((30.0, 0.0885))
    assert path_band(x[:1], y[:1], x[:1], y[:1], segments=10) is None


def test_keep_indices_keeps_extremes_within_its_budget(rng):
    values = rng.normal(size=20_000)
    values[[1234, 17_001]] = [50.0, -50.0]
    values[100:200] = np.nan
    kept = keep_indices(values, 400, always=(7,))
    assert len(kept) <= 400 + 3
    assert {0, 7, 1234, 17_001, 19_999} <= set(kept.tolist())
    assert np.all(np.diff(kept) > 0)
    assert keep_indices(values[:10], 400).tolist() == list(range(10))


def test_phase_spans():
    spans = phase_spans(("seed", "seed", "", "hold"), np.array([0.0, 5.0, 10.0, 15.0]))
    assert [(s.name, s.start_s, s.end_s) for s in spans] == [
        ("seed", 0.0, 10.0),
        ("hold", 15.0, 15.0),
    ]
