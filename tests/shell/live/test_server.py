"""The live page's server on loopback, through a real HTTP client: routes, the event stream,
logins and alarm actions, refusals with clear messages, and nothing fetched from elsewhere."""

from __future__ import annotations

import asyncio
import base64
import dataclasses
import hashlib
import json
import logging
import re
import ssl

import aiohttp
import pytest

from sensor.shell.live.errors import LivePageError
from sensor.shell.live.server import _Stream, sse
from sensor.shell.live.state import json_safe
from sensor.shell.live.trend import TREND_FIELDS
from sensor.shell.opcua.advisor_server import unit_values
from sensor.shell.opcua.security import create_application_certificate
from tests.shell.live.scene import ALARM, UNIT
from tests.shell.opcua.conftest import run
from tests.shell.opcua.desk import OPERATOR, VIEWER, users_file
from tests.shell.report.pages import external_references

SVG_NAMESPACE = "http://www.w3.org/2000/svg"
"""The one URL in the page: the SVG namespace's name, which createElementNS takes and no
browser fetches (W3C, Namespaces in XML 1.0: a namespace name is an identifier)."""


def client() -> aiohttp.ClientSession:
    # unsafe=True: keep cookies from a host given as an IP address (127.0.0.1)
    return aiohttp.ClientSession(
        cookie_jar=aiohttp.CookieJar(unsafe=True), timeout=aiohttp.ClientTimeout(total=20)
    )


async def read_event(response: aiohttp.ClientResponse) -> tuple[str, dict]:
    """The next server-sent event (keep-alive comments skipped), bounded in lines."""
    kind, data = None, None
    for _ in range(50):
        line = (await response.content.readline()).decode().rstrip("\n")
        if line.startswith("event: "):
            kind = line.removeprefix("event: ")
        elif line.startswith("data: "):
            data = json.loads(line.removeprefix("data: "))
        elif line == "" and kind is not None:
            return kind, data
    raise AssertionError("no event in 50 lines")


def test_the_page_loads_nothing_from_elsewhere_and_its_policy_allows_only_itself(scene):
    async def exercise():
        async with scene.page() as page, client() as http, http.get(page.url) as response:
            return response.status, response.headers, await response.text()

    status, headers, html = run(exercise())
    assert status == 200
    assert headers["Content-Type"].startswith("text/html")
    policy = headers["Content-Security-Policy"]
    assert policy.startswith("default-src 'none'")
    scripts = re.findall(r"<script>(.*?)</script>", html, re.DOTALL)
    styles = re.findall(r"<style>(.*?)</style>", html, re.DOTALL)
    assert len(scripts) == 1
    assert len(styles) == 1
    for text, directive in ((scripts[0], "script-src"), (styles[0], "style-src")):
        digest = base64.b64encode(hashlib.sha256(text.encode()).digest()).decode()
        assert f"{directive} 'sha256-{digest}'" in policy  # CSP Level 3, hash-source
    inline = re.sub(r"<script( type=\"application/json\" id=\"setup\")?>", "", html)
    assert external_references(inline.replace(SVG_NAMESPACE, "")) == []
    assert "safety instrumented system keeps protection" in html
    assert "▲ HIGH" in html


def test_state_before_and_after_a_publish(scene):
    first, last = scene.outputs[0], scene.outputs[-1]

    async def exercise():
        async with scene.page() as page, client() as http:
            async with http.get(page.url + "state") as response:
                before = await response.json()
            page.publish(UNIT, first)
            page.publish(UNIT, last)
            async with http.get(page.url + "state") as response:
                return before, await response.json()

    before, after = run(exercise())
    assert before["units"][UNIT]["state"] is None
    assert before["units"][UNIT]["trend"] == []
    unit = after["units"][UNIT]
    assert unit["state"]["values"] == json_safe(unit_values(last))
    assert unit["state"]["communication_lost"] is True
    assert unit["state"]["values"]["estimates.sigma"] == pytest.approx(
        last.step.estimates.sigma[0], rel=1e-15
    )
    assert after["trend_fields"] == list(TREND_FIELDS)
    assert [row[0] for row in unit["trend"]] == [first.time_s, last.time_s]
    assert list(after["diagrams"]) == [unit["diagram"]]
    diagram = after["diagrams"][unit["diagram"]]
    assert len(diagram["temp_c"]) == len(diagram["c_sat"]) == len(diagram["c_limit"])
    assert diagram["rate_k_per_min"] == pytest.approx(
        scene.site.controller.target_zone_rate_k_per_min
    )
    published = [e for outputs in (first, last) for e in outputs.events]
    assert [(row["alarm"], row["event"]) for row in unit["events"]] == [
        (e.alarm, e.kind.value) for e in published
    ]
    top = unit["state"]["alarms"][0]  # most urgent first: the link loss, high, unacknowledged
    assert (top["name"], top["state"], top["label"]) == (ALARM, "unacknowledged", "▲ HIGH")
    assert after["alarm_help"][ALARM]["help"].endswith(
        "the plant's own alarms and trips come first."
    )


def test_the_event_stream_sends_a_snapshot_then_each_step(scene):
    async def exercise():
        async with scene.page() as page, client() as http:
            page.publish(UNIT, scene.outputs[0])
            async with http.get(page.url + "events") as response:
                assert response.headers["Content-Type"] == "text/event-stream"
                snapshot = await read_event(response)
                page.publish(UNIT, scene.outputs[1])
                step = await read_event(response)
            return snapshot, step

    (kind, snapshot), (step_kind, step) = run(exercise())
    assert kind == "snapshot"
    assert snapshot["units"][UNIT]["state"]["time_s"] == scene.outputs[0].time_s
    assert step_kind == "unit"
    assert step["unit"] == UNIT
    assert step["state"]["time_s"] == scene.outputs[1].time_s
    rows = step["closed"] + step["open"]
    assert rows[-1][0] == scene.outputs[1].time_s


def test_sse_format_and_a_slow_page_is_disconnected_not_waited_for():
    # WHATWG HTML, "Server-sent events": fields "retry", "event", "data", a blank line ends it
    assert (
        sse("unit", {"a": None}, retry_ms=3000) == 'retry: 3000\nevent: unit\ndata: {"a": null}\n\n'
    )
    with pytest.raises(ValueError, match="Out of range float values"):
        sse("unit", {"a": float("nan")})

    async def exercise():
        stream = _Stream(8)
        sent = [stream.send(f"m{i}") for i in range(9)]
        return sent, stream.take_all()

    sent, left = asyncio.run(exercise())
    assert all(sent[:8])
    assert not sent[8]
    assert left == [None]  # emptied and told to close: the browser reconnects


def test_publish_refuses_an_unknown_unit_and_a_time_going_back(scene):
    page = scene.page()
    page.publish(UNIT, scene.outputs[5])
    with pytest.raises(LivePageError, match="does not show unit 'CR-999'"):
        page.publish("CR-999", scene.outputs[6])
    with pytest.raises(LivePageError, match=r"unit CR-301: the step's time .* goes back"):
        page.publish(UNIT, scene.outputs[4])
    page.publish(UNIT, dataclasses.replace(scene.outputs[5], events=()))  # the same time: fine


def login_site(scene, tmp_path):
    return scene.page(users_file=users_file(tmp_path))


async def login(http, page, user):
    async with http.post(page.url + "login", json={"user": user[0], "password": user[1]}) as r:
        return r.status, await r.json(), r.headers.getall("Set-Cookie", [])


async def act(http, page, action, body, csrf=None, unit=UNIT, alarm=ALARM):
    headers = {} if csrf is None else {"X-CSRF-Token": csrf}
    url = f"{page.url}alarms/{unit}/{alarm}/{action}"
    async with http.post(url, json=body, headers=headers) as r:
        return r.status, await r.json()


def test_an_operator_acknowledges_and_shelves_with_the_token(scene, tmp_path, caplog):
    caplog.set_level(logging.DEBUG)

    async def exercise():
        async with login_site(scene, tmp_path) as page, client() as http:
            for outputs in scene.outputs:
                page.publish(UNIT, outputs)
            status, session, cookies = await login(http, page, OPERATOR)
            assert status == 200, session
            async with http.get(page.url + "session") as r:
                assert (await r.json())["csrf"] == session["csrf"]
            async with http.get(page.url + "events") as stream:
                await read_event(stream)  # the snapshot
                acknowledged = await act(
                    http, page, "acknowledge", {"comment": "seen"}, session["csrf"]
                )
                broadcast = await read_event(stream)
            shelved = await act(
                http, page, "shelve", {"duration_s": 900, "comment": "network work"},
                session["csrf"],
            )  # fmt: skip
            too_long = await act(http, page, "shelve", {"duration_s": 1e6}, session["csrf"])
            return cookies, acknowledged, broadcast, shelved, too_long

    cookies, acknowledged, broadcast, shelved, too_long = run(exercise())
    (cookie,) = cookies
    assert "HttpOnly" in cookie
    assert "SameSite=Strict" in cookie
    assert "Path=/" in cookie
    assert acknowledged[0] == 200
    assert [e["event"] for e in acknowledged[1]["events"]] == ["acknowledged"]
    assert acknowledged[1]["events"][0]["user"] == OPERATOR[0]
    assert broadcast == ("events", {"unit": UNIT, "events": acknowledged[1]["events"]})
    assert shelved[0] == 200
    assert [a.action for a in scene.actions] == ["acknowledge", "shelve", "shelve"]
    first, second = scene.actions[:2]
    assert (first.unit_id, first.alarm, first.user, first.comment) == (
        UNIT, ALARM, OPERATOR[0], "seen",
    )  # fmt: skip
    assert (second.duration_s, second.comment) == (900.0, "network work")
    assert too_long[0] == 409
    assert "shelve" in too_long[1]["error"]  # the alarm engine's own refusal, passed on
    assert OPERATOR[1] not in caplog.text
    assert "shift-a (operator) logged in" in caplog.text


def test_refusals_say_why(scene, tmp_path, caplog):
    caplog.set_level(logging.DEBUG)

    async def exercise():
        answers = {}
        async with login_site(scene, tmp_path) as page:
            page.publish(UNIT, scene.outputs[-1])
            async with client() as http:
                answers["nobody"] = await act(http, page, "acknowledge", {})
                answers["wrong password"] = (await login(http, page, (OPERATOR[0], "guess")))[:2]
                answers["no such user"] = (await login(http, page, ("nobody", "guess")))[:2]
                async with http.post(
                    page.url + "login?user=shift-a&password=operator+password+1"
                ) as r:
                    answers["password in URL"] = (r.status, await r.json())
                async with http.post(page.url + "login", data="user=a&password=b") as r:
                    answers["form body"] = (r.status, await r.json())
            async with client() as http:
                _status, viewer, _c = await login(http, page, VIEWER)
                answers["viewer"] = await act(http, page, "acknowledge", {}, viewer["csrf"])
            async with client() as http:
                _status, session, _c = await login(http, page, OPERATOR)
                token = session["csrf"]
                answers["no token"] = await act(http, page, "acknowledge", {})
                answers["wrong token"] = await act(http, page, "acknowledge", {}, "x" * 43)
                answers["unit"] = await act(http, page, "acknowledge", {}, token, unit="CR-999")
                answers["alarm"] = await act(http, page, "acknowledge", {}, token, alarm="nope")
                answers["action"] = await act(http, page, "silence", {}, token)
                answers["duration"] = await act(http, page, "shelve", {"duration_s": -5}, token)
                answers["no duration"] = await act(http, page, "shelve", {}, token)
                answers["field"] = await act(http, page, "acknowledge", {"when": 1}, token)
                answers["comment"] = await act(
                    http, page, "acknowledge", {"comment": "x" * 201}, token
                )
                async with http.post(
                    f"{page.url}alarms/{UNIT}/{ALARM}/acknowledge",
                    data="{not json",
                    headers={"X-CSRF-Token": token, "Content-Type": "application/json"},
                ) as r:
                    answers["bad json"] = (r.status, await r.json())
                async with http.post(
                    f"{page.url}alarms/{UNIT}/{ALARM}/acknowledge",
                    data=b"{" + b" " * 20000 + b"}",
                    headers={"X-CSRF-Token": token, "Content-Type": "application/json"},
                ) as r:
                    answers["too big"] = (r.status, await r.text())
                async with http.get(page.url + "nowhere") as r:
                    answers["route"] = (r.status, await r.json())
                async with http.get(page.url + "login") as r:
                    answers["method"] = (r.status, await r.json())
                async with http.post(
                    page.url + "logout", json={}, headers={"X-CSRF-Token": token}
                ) as r:
                    assert r.status == 200
                answers["after logout"] = await act(http, page, "acknowledge", {}, token)
        return answers

    answers = run(exercise())
    expected = {
        "nobody": (401, "log in first"),
        "wrong password": (401, "wrong user name or password"),
        "no such user": (401, "wrong user name or password"),
        "password in URL": (400, "never put a password in a URL"),
        "form body": (400, "send a JSON body"),
        "viewer": (403, "eng-b has the role viewer: only an operator may act"),
        "no token": (403, "missing or wrong X-CSRF-Token"),
        "wrong token": (403, "missing or wrong X-CSRF-Token"),
        "unit": (404, "no unit 'CR-999'"),
        "alarm": (404, "no alarm 'nope'"),
        "action": (404, "no action 'silence'"),
        "duration": (400, "'duration_s' must be a positive number of seconds; got -5"),
        "no duration": (400, "a shelve needs 'duration_s'"),
        "field": (400, "unknown field(s): when"),
        "comment": (400, "'comment' is longer than 200 characters"),
        "bad json": (400, "the body is not valid JSON"),
        "route": (404, "Not Found"),
        "method": (405, "Method Not Allowed"),
        "after logout": (401, "log in first"),
    }
    for name, (status, message) in expected.items():
        assert answers[name][0] == status, (name, answers[name])
        assert message in answers[name][1]["error"], (name, answers[name])
    assert answers["too big"][0] == 413
    assert scene.actions == []
    assert "operator password 1" not in caplog.text
    assert "login refused for 'shift-a'" in caplog.text


def test_without_a_users_file_nobody_logs_in(scene):
    async def exercise():
        async with scene.page() as page, client() as http:
            return await login(http, page, OPERATOR)

    status, answer, cookies = run(exercise())
    assert status == 403
    assert "no users file" in answer["error"]
    assert cookies == []


def test_stopping_closes_the_event_streams(scene):
    async def exercise():
        page = scene.page()
        async with page, client() as http:
            response = await http.get(page.url + "events")
            await read_event(response)
            await page.stop()
            rest = await asyncio.wait_for(response.content.read(), 10.0)
            response.release()
            return rest

    assert run(exercise()) == b""


def test_over_https_the_session_cookie_is_secure(scene, tmp_path):
    der, key = tmp_path / "live.der", tmp_path / "live.key"
    create_application_certificate(der, key, "urn:sigmatrack:live-test", ["127.0.0.1"], days=2)
    pem = tmp_path / "live.pem"
    pem.write_text(ssl.DER_cert_to_PEM_cert(der.read_bytes()))
    page = scene.page(users_file=users_file(tmp_path), certificate=pem, private_key=key)
    trust = ssl.create_default_context(cafile=str(pem))

    async def exercise():
        async with page, client() as http:
            assert page.url.startswith("https://127.0.0.1:")
            async with http.post(
                page.url + "login", json={"user": OPERATOR[0], "password": OPERATOR[1]}, ssl=trust
            ) as response:
                return response.status, response.headers.getall("Set-Cookie")

    status, (cookie,) = run(exercise())
    assert status == 200
    assert "Secure" in cookie
