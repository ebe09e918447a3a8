"""Make README's live-page image: the page with the synthetic scene, as a browser shows it.

Run from the repository's top folder:

    python tests/docs/make_live_image.py

It runs the synthetic scene of ``tests/shell/live/scene.py`` (a short batch of the demo unit
through the real soft sensor, guard and alarm engine; invented data), serves the live page on
a free loopback port, has headless Chromium (driven as in the page's tests) draw it, and
writes the top of it to ``tests/docs/live.png`` (a 256-colour palette keeps the file small).
Needs Chromium (Debian: ``apt-get install chromium``); the page loads nothing from elsewhere.
"""

from __future__ import annotations

import asyncio
import base64
import secrets
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from tests.docs.images import save_small_png  # noqa: E402
from tests.shell.live.browser import CHROMIUM, Browser  # noqa: E402
from tests.shell.live.scene import UNIT, demo_scene, users_file  # noqa: E402

IMAGE = Path(__file__).with_name("live.png")
WIDTH_PX, HEIGHT_PX = 1400, 1000
"""The window the page is drawn in; the image is its top (header, values, charts, alarms)."""


async def _shoot(shot: Path, folder: Path) -> None:
    scene = demo_scene(lost_from=2.0)  # the link never lost
    users = users_file(folder, secrets.token_urlsafe(16))  # a login form; nobody logs in
    window = Browser(CHROMIUM, width=WIDTH_PX, height=HEIGHT_PX)
    async with scene.page(users_file=users) as page, window as b:
        for outputs in scene.outputs:
            page.publish(UNIT, outputs)
        await b.goto(page.url)
        await b.wait_for("document.querySelectorAll('.tile').length > 0")
        result = await b.send("Page.captureScreenshot", {"format": "png"})
        shot.write_bytes(base64.b64decode(result["data"]))


def main() -> None:
    if not CHROMIUM.exists():
        sys.exit("make_live_image: needs Chromium at /usr/bin/chromium (apt-get install chromium)")
    with tempfile.TemporaryDirectory() as folder:
        shot = Path(folder) / "shot.png"
        asyncio.run(asyncio.wait_for(_shoot(shot, Path(folder)), 300.0))
        save_small_png(shot, IMAGE)
    print(f"wrote {IMAGE.relative_to(REPO)}")


if __name__ == "__main__":
    main()
