"""``sigmatrack compare`` end to end on synthetic batches: the overlaid page, the envelope of
the good batches, a batch that leaves it, and the errors a person can make."""

from __future__ import annotations

import pytest

from sensor.shell.cli import main
from sensor.shell.report.build import MIN_NIS_OK_FRACTION
from sensor.shell.report.page import COMPARED
from tests.conftest import DEMO_SITE
from tests.shell.report.conftest import FAST_ID, GOOD_IDS
from tests.shell.report.pages import external_references, parse
from tests.shell.report.test_report_command import replay_json


def compare(synthetic, out, *extra: str) -> int:
    files = [str(synthetic.files[b]) for b in (*GOOD_IDS, FAST_ID)]
    return main(["compare", *files, "--config", str(DEMO_SITE), "--out", str(out), *extra])


@pytest.fixture(scope="module")
def named(synthetic, tmp_path_factory):
    out = tmp_path_factory.mktemp("compare") / "compare.html"
    assert compare(synthetic, out, "--good", ",".join(GOOD_IDS)) == 0
    return out.read_text(encoding="utf-8")


def _rows(page: str) -> dict[str, list[str]]:
    """The HTML of each batch's rows, by batch, in page order (the key figures' row first,
    then the row holding it against the envelope)."""
    rows: dict[str, list[str]] = {}
    for chunk in page.split('<tr data-batch="')[1:]:
        batch, rest = chunk.split('"', 1)
        rows.setdefault(batch, []).append(rest.split("</tr>", 1)[0])
    return rows


def test_the_comparison_is_one_page_that_fetches_nothing(named):
    page = parse(named)
    assert page.problems == []
    assert page.stack == []
    assert external_references(named) == []
    assert {"key-figures", "envelope"} <= set(page.ids)
    assert [a["aria-label"] for t, a in page.tags if t == "svg"] == [
        "Phase diagram of B0, B1, B2, F"
    ]
    assert "Good batches named by the engineer (--good)." in named
    assert "Envelope of 3 good batches (B0, B1, B2)" in named


def test_the_fast_batch_leaves_the_envelope_above(named):
    row = _rows(named)[FAST_ID][-1]
    assert "leaves it" in row
    assert '<span class="flag">above</span>' in row
    assert '<span class="flag">below</span>' not in row


def test_the_table_carries_every_batchs_summary(synthetic, named, capsys):
    summaries = replay_json([synthetic.files[b] for b in (*GOOD_IDS, FAST_ID)], capsys)
    values = parse(named).values
    for kpi in COMPARED:
        expected = [repr(float(summaries[b][kpi.key])) for b in (*GOOD_IDS, FAST_ID)]
        assert values[kpi.key] == expected, kpi.key
    # the fast batch's peak is above the good ones' range, and marked so in words
    peak_cell = _rows(named)[FAST_ID][0].split('data-key="peak_sigma"', 1)[1].split("</td>")[0]
    assert "▲" in peak_cell


def test_by_default_the_good_batches_are_those_meeting_the_criterion(synthetic, tmp_path, capsys):
    summaries = replay_json([synthetic.files[b] for b in (*GOOD_IDS, FAST_ID)], capsys)
    expected = [
        b
        for b, s in summaries.items()
        if s["time_above_limit_s"] == 0.0 and s["nis_ok_fraction"] >= MIN_NIS_OK_FRACTION
    ]
    out = tmp_path / "default.html"
    assert compare(synthetic, out) == 0
    page = out.read_text(encoding="utf-8")
    assert "chosen by sigmatrack's criterion" in " ".join(parse(page).text)
    roles = {b: ("<td>good</td>" in rows[0]) for b, rows in _rows(page).items()}
    assert [b for b, good in roles.items() if good] == expected


def test_an_unknown_good_batch_is_refused(synthetic, tmp_path, capsys):
    assert compare(synthetic, tmp_path / "c.html", "--good", "B0,B9") == 2
    assert "sigmatrack: error: --good: no batch 'B9' among those compared (B0, B1, B2, F)" in (
        capsys.readouterr().err
    )


def test_one_good_batch_makes_no_envelope(synthetic, tmp_path, capsys):
    assert compare(synthetic, tmp_path / "c.html", "--good", "B0") == 2
    assert "an envelope needs at least 2 good batches with a seeded path; got 1" in (
        capsys.readouterr().err
    )


def test_a_comparison_needs_two_batches(synthetic, tmp_path, capsys):
    status = main(
        ["compare", str(synthetic.files["B0"]), "--config", str(DEMO_SITE), "--out",
         str(tmp_path / "c.html")]
    )  # fmt: skip
    assert status == 2
    assert "a comparison needs at least two batches" in capsys.readouterr().err


def test_a_bad_file_is_reported_and_the_others_are_compared(synthetic, tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("timestamp,x\n", encoding="utf-8")
    out = tmp_path / "c.html"
    files = [str(synthetic.files[b]) for b in GOOD_IDS]
    status = main(["compare", *files, str(bad), "--config", str(DEMO_SITE), "--out", str(out)])
    assert status == 2
    assert f"sigmatrack: error: {bad}" in capsys.readouterr().err
    assert set(_rows(out.read_text(encoding="utf-8"))) >= set(GOOD_IDS)
