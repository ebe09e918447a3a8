"""Make README's report image: the demo batch's report, as a person sees it in a browser.

Run from the repository's top folder:

    python tests/docs/make_report_image.py

It simulates the demo batch (``sigmatrack simulate --seed 7``, invented data), replays it,
writes its report with :func:`sensor.shell.report.build.report_html` (no "made" time, so the
page is the same on every run), has headless Chromium take a screenshot of the top of the page
and writes ``tests/docs/report.png`` (a 256-colour palette keeps the file small). Needs Chromium
(Debian: ``apt-get install chromium``); nothing is fetched: the page loads nothing.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import tempfile
from dataclasses import replace
from pathlib import Path

from sensor.errors import SigmatrackError
from sensor.shell.report.build import report_html, write_page
from sensor.shell.report.sources import load_views

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from tests.docs.images import save_small_png  # noqa: E402

SITE = REPO / "config" / "demo-site.toml"
IMAGE = Path(__file__).with_name("report.png")
WIDTH_PX, HEIGHT_PX = 1000, 2290
"""The window the page is drawn in; the image is its top (header to the trends)."""


def _browser() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    sys.exit("make_report_image: needs Chromium on PATH (Debian: apt-get install chromium)")


def _raise(error: SigmatrackError) -> None:
    raise error


def main() -> None:
    browser = _browser()
    with tempfile.TemporaryDirectory() as folder:
        work = Path(folder)
        batch = work / "CR-301-demo.csv"
        subprocess.run(
            [sys.executable, "-m", "sensor.shell.cli", "simulate", "--config", str(SITE),
             "--out", str(batch), "--seed", "7"],
            check=True, stdout=subprocess.DEVNULL, timeout=600,
        )  # fmt: skip
        loaded = load_views(str(SITE), [str(batch)], [], on_error=_raise)
        (view,) = loaded.views
        view = replace(view, source="the demo batch, simulated (invented data)")
        page = work / "report.html"
        write_page(page, report_html(loaded.site, loaded.zone, view))
        shot = work / "shot.png"
        subprocess.run(
            [browser, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
             f"--window-size={WIDTH_PX},{HEIGHT_PX}", f"--screenshot={shot}", page.as_uri()],
            check=True, capture_output=True, timeout=300,
        )  # fmt: skip
        save_small_png(shot, IMAGE)
    print(f"wrote {IMAGE.relative_to(REPO)}")


if __name__ == "__main__":
    main()
