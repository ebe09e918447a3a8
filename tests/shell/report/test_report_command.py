"""``sigmatrack report`` and ``replay --report`` end to end on synthetic historian files: the
page's structure, its numbers (the replay summary's own), that it fetches nothing, and the
errors a person can make."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from sensor.shell.cli import main
from sensor.shell.report.page import CAUTION, KPIS
from tests.conftest import DEMO_SITE
from tests.shell.report.conftest import FAST_ID, GOOD_IDS
from tests.shell.report.pages import external_references, parse

SUMMARY_KEYS = tuple(k.key for k in KPIS)


def replay_json(files, capsys) -> dict[str, dict]:
    """The summaries ``sigmatrack replay --json`` prints, by batch."""
    assert main(["replay", *map(str, files), "--config", str(DEMO_SITE), "--json"]) == 0
    return {s["batch"]: s for s in json.loads(capsys.readouterr().out)}


def assert_numbers_are_the_summary(
    values: dict[str, list[str]], summary: dict, shadow_alarms: bool = True
) -> None:
    """Every key figure on the page carries the summary's number exactly (and the alarm
    counts, unless the page shows alarms recorded live rather than the shadow run's)."""
    for key in SUMMARY_KEYS:
        assert values[key] == [repr(float(summary[key]))], key
    for reason, count in summary["rejected_by_reason"].items():
        assert values[f"rejected_by_reason.{reason}"] == [str(count)]
    if not shadow_alarms:
        return
    # alarms by type, from the advisor's shadow run: the summary's counts, and no others
    raised = summary["alarms_raised"]
    assert raised is not None
    shown = {k.split(".", 1)[1]: v for k, v in values.items() if k.startswith("alarms_raised.")}
    assert shown == {alarm: [str(n)] for alarm, n in raised.items()}


@pytest.fixture(scope="module")
def fast_report(synthetic, tmp_path_factory):
    out = tmp_path_factory.mktemp("page") / "report.html"
    status = main(
        ["report", str(synthetic.files[FAST_ID]), "--config", str(DEMO_SITE), "--out", str(out)]
    )
    assert status == 0
    return out.read_text(encoding="utf-8")


def test_the_report_is_one_well_formed_page_with_its_parts(fast_report):
    page = parse(fast_report)
    assert page.problems == []
    assert page.stack == []  # everything opened was closed
    ids = set(page.ids)
    assert {"key-figures", "alarms", "data-quality"} <= ids
    assert len(ids) == len(page.ids)  # ids unique in the page, across both drawings
    svgs = [attrs for tag, attrs in page.tags if tag == "svg"]
    assert [s["aria-label"] for s in svgs] == [
        f"Phase diagram of {FAST_ID}",
        f"Supersaturation and temperatures of {FAST_ID}",
    ]
    assert all(s["width"] == "100%" for s in svgs)
    text = " ".join(page.text)
    assert f"Batch {FAST_ID}" in text
    assert CAUTION in text  # the advisory caution, where a person reads the report
    assert "@media print" in fast_report  # a print layout


def test_the_report_fetches_nothing(fast_report):
    assert external_references(fast_report) == []
    assert "<style>" in fast_report  # the style sheet is inline


def test_the_external_reference_check_can_fail():
    for bad in (
        '<link rel="stylesheet" href="a.css">',
        '<img src="x.png">',
        "<style>@import 'a.css';</style>",
        '<a href="https://example.invalid/">x</a>',
        "<style>p { background: url(x.png) }</style>",
        '<script src="a.js"></script>',
    ):
        assert external_references(bad), bad
    assert external_references('<use href="#f1-m1"/><path clip-path="url(#f1-p1)"/>') == []


def test_the_reports_numbers_are_the_replay_summarys(synthetic, fast_report, capsys):
    summaries = replay_json([synthetic.files[FAST_ID]], capsys)
    assert_numbers_are_the_summary(parse(fast_report).values, summaries[FAST_ID])


def test_replay_writes_a_report_per_batch_with_the_same_numbers(synthetic, tmp_path, capsys):
    files = [synthetic.files[b] for b in (*GOOD_IDS, FAST_ID)]
    summaries = replay_json(files, capsys)
    folder = tmp_path / "reports"
    status = main(["replay", *map(str, files), "--config", str(DEMO_SITE), "--report", str(folder)])
    assert status == 0
    assert sorted(p.name for p in folder.iterdir()) == ["B0.html", "B1.html", "B2.html", "F.html"]
    for batch_id in (*GOOD_IDS, FAST_ID):
        page = (folder / f"{batch_id}.html").read_text(encoding="utf-8")
        assert_numbers_are_the_summary(parse(page).values, summaries[batch_id])


def test_a_file_of_two_batches_is_refused(synthetic, tmp_path, capsys):
    both = tmp_path / "two.csv"
    first = synthetic.files["B0"].read_text(encoding="utf-8").splitlines()
    second = synthetic.files["B1"].read_text(encoding="utf-8").splitlines()
    # the second batch later in time, so that timestamps still increase
    later = [line.replace("2023-11-14T", "2023-11-15T") for line in second[2:]]
    both.write_text("\n".join([*first, *later]) + "\n", encoding="utf-8")
    status = main(["report", str(both), "--config", str(DEMO_SITE), "--out", str(tmp_path / "r")])
    err = capsys.readouterr().err
    assert status == 2
    assert f"{both}: holds 2 batches (B0, B1); a report is of one batch" in err


def test_one_batch_must_be_named(tmp_path, capsys):
    out = str(tmp_path / "r.html")
    assert main(["report", "--config", str(DEMO_SITE), "--out", out]) == 2
    assert "give one batch: a historian file (BATCH.csv) or --batch ID" in capsys.readouterr().err


def test_a_page_that_cannot_be_written_is_an_error(synthetic, tmp_path, capsys):
    out = tmp_path / "missing-folder" / "report.html"
    status = main(
        ["report", str(synthetic.files["B0"]), "--config", str(DEMO_SITE), "--out", str(out)]
    )
    assert status == 2
    assert f"sigmatrack: error: {out}: cannot be written (No such file or directory)" in (
        capsys.readouterr().err
    )
    assert not out.parent.exists()


def test_a_bad_file_is_reported_on_one_line(synthetic, tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    lines = synthetic.files["B0"].read_text(encoding="utf-8").splitlines()
    lines[20] = lines[19]  # a repeated timestamp
    bad.write_text("\n".join(lines) + "\n", encoding="utf-8")
    status = main(["report", str(bad), "--config", str(DEMO_SITE), "--out", str(tmp_path / "r")])
    err = capsys.readouterr().err
    assert status == 2
    assert f"sigmatrack: error: {bad}, line 21: timestamp" in err
    assert len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("command", ["report", "compare"])
def test_help(command):
    done = subprocess.run(
        [sys.executable, "-m", "sensor.shell.cli", command, "--help"],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0
    assert "--batch" in done.stdout
    assert "--out" in done.stdout
