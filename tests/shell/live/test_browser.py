"""The live page end to end in headless Chromium (Debian's package): it loads with no request
to anywhere but its own server, shows the published numbers, follows the server-sent updates,
lets a logged-in operator acknowledge an alarm (the handler receives it), says when a unit has
no data and when the server is gone, and leaves a screenshot in the test's folder."""

from __future__ import annotations

import dataclasses
import json

from sensor.shell.live.server import LivePage, site_diagrams
from tests.shell.live.browser import Browser, chromium_or_skip
from tests.shell.live.scene import ALARM, UNIT
from tests.shell.opcua.conftest import run
from tests.shell.opcua.desk import OPERATOR, users_file
from tests.synthetic import demo_site_and_zone

OTHER = "CR-302"
"""A second unit that never publishes."""
SECTION = f"document.querySelector('section[data-unit=\"{UNIT}\"]')"


def tile_values(unit: str) -> str:
    return (
        f"[...document.querySelectorAll('section[data-unit=\"{unit}\"] .tile .value')]"
        ".map((e) => e.textContent)"
    )


def test_the_page_in_chromium(scene, tmp_path):
    chromium = chromium_or_skip()
    site, zone = demo_site_and_zone()
    lines = site_diagrams(site, zone)[UNIT]
    live = dataclasses.replace(site.live, port=0, users_file=users_file(tmp_path))
    page = LivePage(
        live, {UNIT: lines, OTHER: lines}, scene.definitions, scene.act, title="MB-417 demo"
    )
    shown, following = scene.outputs[-3], scene.outputs[-2]
    screenshot = tmp_path / "live.png"

    async def exercise():
        async with page, Browser(chromium) as browser:
            for outputs in scene.outputs[:-2]:
                page.publish(UNIT, outputs)
            await browser.goto(page.url)
            await browser.wait_for(f"{tile_values(UNIT)}.length === 8")
            first = await browser.evaluate(tile_values(UNIT))
            badges = await browser.evaluate(f"{SECTION}.querySelector('.status').textContent")
            other = await browser.evaluate(
                f"document.querySelector('section[data-unit=\"{OTHER}\"] .status').textContent"
            )
            path_before = await browser.evaluate(
                f"{SECTION}.querySelector('path[data-series=\"sigma\"]').getAttribute('d').length"
            )
            page.publish(UNIT, following)
            expected = f"{following.step.estimates.sigma[0]:.4f}"
            await browser.wait_for(f"{tile_values(UNIT)}[0] === {json.dumps(expected)}")
            path_after = await browser.evaluate(
                f"{SECTION}.querySelector('path[data-series=\"sigma\"]').getAttribute('d').length"
            )
            await browser.evaluate(
                "(() => { const f = document.getElementById('login-form');"
                f" f.user.value = {json.dumps(OPERATOR[0])};"
                f" f.password.value = {json.dumps(OPERATOR[1])};"
                " f.querySelector('button').click(); })()"
            )
            who = await browser.wait_for("document.getElementById('who')?.textContent")
            button = (
                f'{SECTION}.querySelector(\'[data-alarm="{ALARM}"] '
                'button[data-action="acknowledge"]\')'
            )
            await browser.wait_for(f"!{button}.disabled")
            await browser.evaluate(
                f"{SECTION}.querySelector('[data-alarm=\"{ALARM}\"] input').value = 'seen';"
                f" {button}.click()"
            )
            message = await browser.wait_for(
                f"{SECTION}.querySelector('.message').textContent.includes('done') &&"
                f" {SECTION}.querySelector('.message').textContent"
            )
            page.publish(UNIT, dataclasses.replace(scene.current(), time_s=scene.time_s))
            row = f"{SECTION}.querySelector('tr[data-alarm-row=\"{ALARM}\"]')"
            state = await browser.wait_for(
                f"{row}.dataset.state === 'acknowledged' && {row}.dataset.state"
            )
            events = await browser.evaluate(f"{SECTION}.querySelector('table.events').textContent")
            comment = await browser.evaluate(
                f"{SECTION}.querySelector('[data-alarm=\"{ALARM}\"] input').value"
            )
            await browser.screenshot(screenshot)
            await page.stop()
            link = await browser.wait_for(
                "document.getElementById('link').textContent.includes('LOST') &&"
                " document.getElementById('link').textContent"
            )
            requests = list(browser.requests)
            console = list(browser.console)
        return locals()

    seen = run(exercise(), timeout_s=120.0)
    values = shown.step.estimates.row(0)
    assert seen["first"][0] == f"{values['sigma']:.4f}"
    assert seen["first"][1] == f"{values['sigma_limit']:.4f}"
    assert seen["first"][3] == f"{values['temp_c']:.2f} °C"
    assert "COMMUNICATION LOST" in seen["badges"]  # the scene's last steps lost the link
    assert "NO DATA YET" in seen["other"]
    assert seen["path_after"] > seen["path_before"]
    assert seen["who"] == f"logged in: {OPERATOR[0]} (operator)"
    assert seen["message"] == f"{ALARM}: acknowledge done by {OPERATOR[0]}"
    (action,) = scene.actions
    assert (action.unit_id, action.alarm, action.action, action.user, action.comment) == (
        UNIT, ALARM, "acknowledge", OPERATOR[0], "seen",
    )  # fmt: skip
    assert seen["state"] == "acknowledged"
    assert "acknowledged" in seen["events"]
    assert seen["comment"] == ""  # the comment box is cleared once the action is done
    assert OPERATOR[0] in seen["events"]
    assert "CONNECTION TO SIGMATRACK LOST" in seen["link"]
    assert seen["requests"], "the browser made no request at all"
    assert all(url.startswith(page.url) for url in seen["requests"]), seen["requests"]
    assert seen["console"] == []
    png = screenshot.read_bytes()
    assert png.startswith(b"\x89PNG\r\n\x1a\n")
    assert len(png) > 20_000
