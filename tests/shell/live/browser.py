"""Headless Chromium driven over the Chrome DevTools Protocol, for the live page's tests.

Debian's ``chromium`` (``/usr/bin/chromium``) is started with a fresh profile, no sandbox, no
GPU and none of its background traffic, and a DevTools port on loopback; this module talks to
it over the protocol's WebSocket (aiohttp's client) in flat session mode. Every wait is bounded.
Nothing is downloaded: where Chromium is missing, :func:`chromium_or_skip` installs Debian's
package with apt-get (bounded in time) if it can, and otherwise skips the test saying why.

The protocol's methods used (``Target.createTarget``, ``Target.attachToTarget``,
``Page.navigate``, ``Page.captureScreenshot``, ``Runtime.evaluate``, ``Network.enable`` and
its ``Network.requestWillBeSent`` event, ``Emulation.setDeviceMetricsOverride``) are those of
the Chrome DevTools Protocol's stable domains (chromedevtools.github.io/devtools-protocol).
"""

from __future__ import annotations

import asyncio
import base64
import contextlib
import itertools
import json
import os
import re
import shutil
import subprocess
import tempfile
from pathlib import Path
from typing import Any

import aiohttp
import pytest

CHROMIUM = Path("/usr/bin/chromium")
UPDATE_TIMEOUT_S, INSTALL_TIMEOUT_S = 300, 600
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-default-apps",
    "--disable-extensions",
    "--hide-scrollbars",
    "--remote-debugging-address=127.0.0.1",
    "--remote-debugging-port=0",
)
LISTENING = re.compile(rb"DevTools listening on (ws://\S+)")


def chromium_or_skip() -> Path:
    """Debian's Chromium: there already, or installed now with apt-get; otherwise a skip."""
    if CHROMIUM.exists():
        return CHROMIUM
    apt = shutil.which("apt-get")
    if apt is None or os.geteuid() != 0:
        pytest.skip(
            "needs Chromium at /usr/bin/chromium (apt-get install chromium); cannot install"
        )
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    try:
        for command, timeout_s in (
            ([apt, "update", "-qq"], UPDATE_TIMEOUT_S),
            ([apt, "install", "-y", "-qq", "chromium"], INSTALL_TIMEOUT_S),
        ):
            subprocess.run(command, check=True, capture_output=True, timeout=timeout_s, env=env)
    except (subprocess.SubprocessError, OSError) as error:
        pytest.skip(
            f"needs Chromium at /usr/bin/chromium; apt-get install chromium failed: {error}"
        )
    if not CHROMIUM.exists():
        pytest.skip("needs Chromium at /usr/bin/chromium; the package did not install it there")
    return CHROMIUM


class Browser:
    """One headless Chromium with one page (an async context manager)."""

    def __init__(self, executable: Path, *, width: int = 1400, height: int = 1800) -> None:
        self.executable = executable
        self.width, self.height = width, height
        self.requests: list[str] = []
        self.console: list[str] = []
        self._ids = itertools.count(1)
        self._pending: dict[int, asyncio.Future[dict[str, Any]]] = {}
        self._loaded = asyncio.Event()
        self._profile = tempfile.TemporaryDirectory(prefix="sigmatrack-chromium-")
        self._process: asyncio.subprocess.Process | None = None
        self._http: aiohttp.ClientSession | None = None
        self._socket: aiohttp.ClientWebSocketResponse | None = None
        self._reader: asyncio.Task[None] | None = None
        self._session = ""

    async def __aenter__(self) -> Browser:
        try:
            await asyncio.wait_for(self._start(), 60.0)
        except BaseException:
            await self.close()
            raise
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.close()

    async def _start(self) -> None:
        self._process = await asyncio.create_subprocess_exec(
            str(self.executable), *FLAGS, f"--user-data-dir={self._profile.name}",
            f"--window-size={self.width},{self.height}", "about:blank",
            stdout=asyncio.subprocess.DEVNULL, stderr=asyncio.subprocess.PIPE,
        )  # fmt: skip
        assert self._process.stderr is not None
        url = None
        for _ in range(200):
            line = await self._process.stderr.readline()
            if not line:
                break
            found = LISTENING.search(line)
            if found:
                url = found.group(1).decode()
                break
        if url is None:
            raise RuntimeError("Chromium did not say where DevTools listens")
        self._drain = asyncio.create_task(self._process.stderr.read())
        self._http = aiohttp.ClientSession()
        self._socket = await self._http.ws_connect(url, max_msg_size=64 * 2**20)
        self._reader = asyncio.create_task(self._read())
        target = await self.send("Target.createTarget", {"url": "about:blank"}, browser=True)
        attached = await self.send(
            "Target.attachToTarget", {"targetId": target["targetId"], "flatten": True}, browser=True
        )
        self._session = attached["sessionId"]
        for domain in ("Page", "Runtime", "Network"):
            await self.send(f"{domain}.enable")
        await self.send(
            "Emulation.setDeviceMetricsOverride",
            {"width": self.width, "height": self.height, "deviceScaleFactor": 1, "mobile": False},
        )

    async def _read(self) -> None:
        assert self._socket is not None
        async for message in self._socket:
            if message.type is not aiohttp.WSMsgType.TEXT:
                break
            data = json.loads(message.data)
            if "id" in data:
                future = self._pending.pop(data["id"], None)
                if future is not None and not future.done():
                    future.set_result(data)
                continue
            method, params = data.get("method"), data.get("params", {})
            if method == "Network.requestWillBeSent":
                self.requests.append(params["request"]["url"])
            elif method == "Page.loadEventFired":
                self._loaded.set()
            elif method == "Runtime.consoleAPICalled":
                self.console.append(" ".join(str(a.get("value", "")) for a in params["args"]))
            elif method == "Runtime.exceptionThrown":
                self.console.append("exception: " + json.dumps(params["exceptionDetails"])[:500])
        for future in self._pending.values():
            if not future.done():
                future.set_exception(RuntimeError("the DevTools connection closed"))

    async def send(
        self, method: str, params: dict[str, Any] | None = None, *, browser: bool = False,
        timeout_s: float = 20.0,
    ) -> dict[str, Any]:  # fmt: skip
        """Call a DevTools method (on the page, or on the browser) and return its result."""
        assert self._socket is not None
        ident = next(self._ids)
        message: dict[str, Any] = {"id": ident, "method": method, "params": params or {}}
        if not browser:
            message["sessionId"] = self._session
        future: asyncio.Future[dict[str, Any]] = asyncio.get_running_loop().create_future()
        self._pending[ident] = future
        await self._socket.send_str(json.dumps(message))
        answer = await asyncio.wait_for(future, timeout_s)
        if "error" in answer:
            raise RuntimeError(f"{method}: {answer['error']}")
        return answer.get("result", {})

    async def goto(self, url: str, timeout_s: float = 20.0) -> None:
        self._loaded.clear()
        await self.send("Page.navigate", {"url": url})
        await asyncio.wait_for(self._loaded.wait(), timeout_s)

    async def evaluate(self, expression: str) -> Any:
        """The value of a JavaScript expression in the page (promises awaited)."""
        result = await self.send(
            "Runtime.evaluate",
            {"expression": expression, "returnByValue": True, "awaitPromise": True},
        )
        if "exceptionDetails" in result:
            raise RuntimeError(f"{expression}: {result['exceptionDetails']}")
        return result["result"].get("value")

    async def wait_for(self, expression: str, timeout_s: float = 15.0, every_s: float = 0.1) -> Any:
        """Poll ``expression`` until it is truthy (bounded: at most ``timeout_s``)."""
        for _ in range(int(timeout_s / every_s) + 1):
            value = await self.evaluate(expression)
            if value:
                return value
            await asyncio.sleep(every_s)
        raise TimeoutError(f"waited {timeout_s} s for {expression}")

    async def screenshot(self, path: Path) -> None:
        """A PNG of the whole page."""
        height = await self.evaluate("document.documentElement.scrollHeight")
        result = await self.send(
            "Page.captureScreenshot",
            {
                "format": "png",
                "captureBeyondViewport": True,
                "clip": {"x": 0, "y": 0, "width": self.width, "height": height, "scale": 1},
            },
        )
        path.write_bytes(base64.b64decode(result["data"]))

    async def close(self) -> None:
        if self._socket is not None:
            with contextlib.suppress(Exception):
                await self.send("Browser.close", browser=True, timeout_s=5.0)
            await self._socket.close()
        if self._reader is not None:
            self._reader.cancel()
            with contextlib.suppress(BaseException):
                await self._reader
        if self._http is not None:
            await self._http.close()
        if self._process is not None:
            if self._process.returncode is None:
                try:
                    await asyncio.wait_for(self._process.wait(), 10.0)
                except TimeoutError:
                    self._process.kill()
                    await self._process.wait()
            with contextlib.suppress(BaseException):
                await asyncio.wait_for(self._drain, 5.0)
        self._profile.cleanup()
