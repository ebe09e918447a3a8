"""The live page's HTTP server (aiohttp): the page, its server-sent updates, logins, actions.

Routes (everything else: 404; a wrong method: 405; a body over 16 KiB: 413)::

    GET  /                         the page (one HTML document; nothing else to load)
    GET  /events                   server-sent events: "snapshot" on connect (every unit's
                                   state, events and trend, and the phase diagrams, each
                                   diagram once however many units share it), then "unit" per
                                   publish and "events" after an operator's action
    GET  /state                    the snapshot as JSON (what "snapshot" carries)
    GET  /session                  who is logged in ({"user", "role", "csrf"}); 401 if nobody
    POST /login                    JSON {"user", "password"}: sets the session cookie
    POST /logout                   ends the session
    POST /alarms/{unit}/{alarm}/{action}
                                   action = acknowledge | shelve | unshelve; JSON {"comment",
                                   "duration_s" (shelve only, s)}; needs an operator's session
                                   and the header X-CSRF-Token; answers {"events": [...]}

Errors are JSON ``{"error": "..."}`` that say what is wrong: 400 a malformed request, 401 not
logged in (or a wrong password), 403 not an operator or a missing or wrong CSRF token, 404 an
unknown unit or alarm, 409 the alarm engine refused the action (e.g. a shelve too long), 503
too many pages open. A request whose URL holds a password is refused (400) and never logged;
the access log is off (it would log URLs).

Every response forbids loading anything from anywhere but this server (Content-Security-Policy
``default-src 'none'``; the page's one script and style sheet allowed by their hashes).

Server-sent events: each page has a queue of :data:`QUEUE_STEPS` messages per unit, sent in
one write whenever it wakes; a page that falls that far behind is disconnected (its browser
reconnects at once and gets a fresh snapshot), so a slow page never holds up
:meth:`LivePage.publish`. A comment line every :data:`KEEPALIVE_S` seconds keeps idle
connections open.
"""

from __future__ import annotations

import asyncio
import json
import logging
import math
import ssl
from collections import deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from aiohttp import web

from controller.alarms import AlarmDefinition, AlarmEvent
from controller.errors import ControllerError
from sensor.metastable import MetastableZone
from sensor.shell.config import LiveConfig, SiteConfig
from sensor.shell.lifecycle import Started
from sensor.shell.live.auth import COOKIE, Session, Sessions, csrf_ok
from sensor.shell.live.errors import LivePageError
from sensor.shell.live.page import PageSetup, page_response_parts
from sensor.shell.live.state import (
    JsonValue,
    alarm_help,
    diagram_json,
    event_row,
    json_safe,
    trend_row,
    unit_state,
)
from sensor.shell.live.trend import TREND_FIELDS, TrendBuffer
from sensor.shell.opcua.advisor_server import OperatorAction, OperatorHandler, UnitOutputs
from sensor.shell.opcua.users import Users
from sensor.shell.report.curves import ZoneCurves, zone_curves
from sensor.units import ZERO_CELSIUS_K

_log = logging.getLogger(__name__)

QUEUE_STEPS = 8
"""Steps of every unit that may wait for one page before it is disconnected (it then
reconnects and gets a fresh snapshot): the queue holds ``QUEUE_STEPS`` messages per unit."""
KEEPALIVE_S = 15.0
"""Seconds between keep-alive comments on an idle event stream."""
RETRY_MS = 3000
"""How long a browser waits before reconnecting a lost event stream [ms]."""
MAX_PAGES = 32
"""Event streams open at once; more are refused (503)."""
MAX_BODY_BYTES = 16 * 1024
EVENTS_KEPT = 50
"""Alarm events kept per unit for the page's list (the newest)."""
MAX_COMMENT = 200
"""Longest operator comment accepted [characters]."""
ACTIONS = ("acknowledge", "shelve", "unshelve")
MAX_SHELVE_S = 7 * 24 * 3600
"""Longest shelve the page passes on [s] (the alarm engine's own limit is usually shorter)."""
LOGINS_AT_ONCE = 2
"""Password checks running at once (each costs tens of ms of CPU: scrypt)."""


@dataclass
class _Unit:
    trend: TrendBuffer
    state: dict[str, JsonValue] | None = None
    events: deque[dict[str, JsonValue]] = field(default_factory=lambda: deque(maxlen=EVENTS_KEPT))


class _Stream:
    """One open event stream: its queue (of ``size`` messages), closed with None."""

    def __init__(self, size: int) -> None:
        self.queue: asyncio.Queue[str | None] = asyncio.Queue(size)

    def take_all(self) -> list[str | None]:
        """Every message waiting now (sent in one write)."""
        taken = []
        while not self.queue.empty():
            taken.append(self.queue.get_nowait())
        return taken

    def send(self, message: str | None) -> bool:
        """Queue a message; False (and the stream told to close) if it is full."""
        try:
            self.queue.put_nowait(message)
        except asyncio.QueueFull:
            while not self.queue.empty():
                self.queue.get_nowait()
            self.queue.put_nowait(None)
            return False
        return True


def sse(kind: str, data: JsonValue, *, retry_ms: int | None = None) -> str:
    """One server-sent event (WHATWG HTML Living Standard, "Server-sent events"; the section
    number, 9.2, from memory): an optional ``retry:`` line, an ``event:`` line, one ``data:``
    line of JSON (which holds no newline), a blank line."""
    head = f"retry: {retry_ms}\n" if retry_ms is not None else ""
    return f"{head}event: {kind}\ndata: {json.dumps(data, allow_nan=False)}\n\n"


def _error(status: int, message: str) -> web.Response:
    return web.json_response({"error": message}, status=status)


DIAGRAM_MARGIN_K = 3.0
"""How far the phase diagram reaches beyond the solubility curve's trusted range [K]."""


def site_diagrams(site: SiteConfig, zone: MetastableZone) -> dict[str, ZoneCurves]:
    """Each unit's phase-diagram lines from the site's zone: the solubility curve over its
    trusted range (the data's, widened by the extrapolation margin) and :data:`DIAGRAM_MARGIN_K`
    more on each side, drawn dotted; the metastable limit at the site's usual cooling rate
    (``controller.target_zone_rate_k_per_min``), as in the reports."""
    curve = zone.solubility
    lo_k, hi_k = curve.temp_range_k
    reach = curve.extrapolation_margin_k + DIAGRAM_MARGIN_K
    lines = zone_curves(
        zone,
        lo_k - reach - ZERO_CELSIUS_K,
        hi_k + reach - ZERO_CELSIUS_K,
        site.controller.target_zone_rate_k_per_min / 60.0,
    )
    return {unit.id: lines for unit in site.unit}


class LivePage(Started):
    """The live trend page's server (module docstring); an async context manager.

    Parameters
    ----------
    config : the site file's ``[live]`` section (host, port, window, points, sessions, users,
        HTTPS)
    diagrams : each unit's phase-diagram lines, by unit id (the units the page shows, in order)
    alarm_definitions : the alarms of every unit (their help texts and priorities)
    operator_action : carries out an operator's acknowledge, shelve or unshelve (the same
        handler as the OPC UA server's)
    title : the page's heading (the site's name)
    users : who may log in (default: ``config.users_file``; none: the page is view-only)
    """

    def __init__(
        self,
        config: LiveConfig,
        diagrams: Mapping[str, ZoneCurves],
        alarm_definitions: Sequence[AlarmDefinition],
        operator_action: OperatorHandler,
        *,
        title: str,
        users: Users | None = None,
    ) -> None:
        if not diagrams:
            raise LivePageError("the live page needs at least one unit")
        self.config = config
        self.operator_action = operator_action
        self.users = users if users is not None else Users.from_file(config.users_file)
        self.sessions = Sessions(config.session_minutes * 60.0)
        window_s = config.trend_hours * 3600.0
        self._units = {
            unit_id: _Unit(TrendBuffer(window_s, config.trend_points)) for unit_id in diagrams
        }
        # Units sharing one zone share one diagram: the snapshot carries each once.
        keys: dict[int, str] = {}
        self._diagram_keys = {
            unit_id: keys.setdefault(id(curves), f"d{len(keys)}")
            for unit_id, curves in diagrams.items()
        }
        by_key = {keys[id(curves)]: curves for curves in diagrams.values()}
        self._diagrams: dict[str, JsonValue] = {k: diagram_json(c) for k, c in by_key.items()}
        self._alarms = {d.name: d for d in alarm_definitions}
        self._queue_size = QUEUE_STEPS * len(self._units)
        self._help = alarm_help(alarm_definitions)
        self._streams: set[_Stream] = set()
        self._logins = asyncio.Semaphore(LOGINS_AT_ONCE)
        self._runner: web.AppRunner | None = None
        self._port = 0
        self._tls = config.certificate is not None
        self._page = page_response_parts(
            PageSetup(
                title=title,
                units=tuple(diagrams),
                window_s=window_s,
                stale_after_s=config.stale_after_s,
                trend_fields=TREND_FIELDS,
                max_rows=next(iter(self._units.values())).trend.capacity,
                events_kept=EVENTS_KEPT,
                login=bool(self.users),
            )
        )

    # --- lifecycle ----------------------------------------------------------------------------

    @property
    def port(self) -> int:
        """The port it listens on (the one chosen when ``port = 0``)."""
        return self._port

    @property
    def url(self) -> str:
        scheme = "https" if self._tls else "http"
        host = self.config.host
        host = f"[{host}]" if ":" in host else host
        return f"{scheme}://{host}:{self._port}/"

    async def start(self) -> None:
        """Listen on ``config.host:config.port``.

        Raises
        ------
        OSError
            If the address cannot be bound (in use, not this machine's).
        """
        app = web.Application(client_max_size=MAX_BODY_BYTES, middlewares=[self._guard])
        app.router.add_get("/", self._index)
        app.router.add_get("/events", self._events)
        app.router.add_get("/state", self._state)
        app.router.add_get("/session", self._session)
        app.router.add_post("/login", self._login)
        app.router.add_post("/logout", self._logout)
        app.router.add_post("/alarms/{unit}/{alarm}/{action}", self._act)
        runner = web.AppRunner(app, access_log=None, handle_signals=False, shutdown_timeout=1.0)
        await runner.setup()
        context = None
        if self.config.certificate is not None:
            context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
            context.load_cert_chain(self.config.certificate, self.config.private_key)
        site = web.TCPSite(runner, self.config.host, self.config.port, ssl_context=context)
        try:
            await site.start()
        except BaseException:
            await runner.cleanup()
            raise
        self._runner = runner
        self._port = int(runner.addresses[0][1])
        _log.info("live page at %s", self.url)

    async def stop(self) -> None:
        """Close every event stream and stop listening."""
        for stream in list(self._streams):
            stream.send(None)
        if self._runner is not None:
            await self._runner.cleanup()
            self._runner = None

    # --- feeding ------------------------------------------------------------------------------

    def publish(self, unit_id: str, outputs: UnitOutputs) -> None:
        """Show one unit's step: its values, alarms and alarm events, a point of its trend.

        Never waits: every open page gets the step queued.

        Raises
        ------
        LivePageError
            For a unit the page does not show, or a step time going back.
        """
        unit = self._units.get(unit_id)
        if unit is None:
            raise LivePageError(f"the live page does not show unit {unit_id!r}")
        try:
            closed = unit.trend.add(trend_row(outputs))
        except LivePageError as error:
            raise LivePageError(f"unit {unit_id}: {error}") from None
        unit.state = unit_state(outputs)
        new_events = [event_row(e) for e in outputs.events]
        unit.events.extend(new_events)
        self._broadcast(
            sse(
                "unit",
                {
                    "unit": unit_id,
                    "state": unit.state,
                    "events": new_events,
                    "closed": json_safe(closed),
                    "open": json_safe(unit.trend.open_rows()),
                },
            )
        )

    def _broadcast(self, message: str) -> None:
        for stream in list(self._streams):
            if not stream.send(message):
                _log.warning("a live page fell %d messages behind: disconnected", self._queue_size)

    def snapshot(self) -> dict[str, JsonValue]:
        """Everything the page shows now (the "snapshot" event and ``GET /state``)."""
        units: dict[str, JsonValue] = {}
        for unit_id, unit in self._units.items():
            units[unit_id] = {
                "state": unit.state,
                "events": list(unit.events),
                "trend": json_safe(unit.trend.rows()),
                "diagram": self._diagram_keys[unit_id],
            }
        return {
            "units": units,
            "diagrams": self._diagrams,
            "alarm_help": self._help,
            "trend_fields": list(TREND_FIELDS),
        }

    # --- HTTP ---------------------------------------------------------------------------------

    @web.middleware
    async def _guard(self, request: web.Request, handler: Any) -> web.StreamResponse:
        if "password" in request.query_string.lower():
            return _error(400, "never put a password in a URL: send it in the body of POST /login")
        try:
            response = await handler(request)
        except web.HTTPException as error:
            response = _error(error.status, error.reason)
        response.headers.setdefault("Content-Security-Policy", self._page.policy)
        response.headers["X-Content-Type-Options"] = "nosniff"
        response.headers["Referrer-Policy"] = "no-referrer"
        response.headers.setdefault("Cache-Control", "no-store")
        return response

    async def _index(self, request: web.Request) -> web.Response:
        return web.Response(text=self._page.html, content_type="text/html", charset="utf-8")

    async def _state(self, request: web.Request) -> web.Response:
        return web.json_response(json_safe(self.snapshot()), dumps=_dumps)

    async def _events(self, request: web.Request) -> web.StreamResponse:
        if len(self._streams) >= MAX_PAGES:
            return _error(503, f"{MAX_PAGES} pages are open already: close one")
        response = web.StreamResponse(
            headers={"Content-Type": "text/event-stream", "Cache-Control": "no-store"}
        )
        stream = _Stream(self._queue_size)
        self._streams.add(stream)
        try:
            await response.prepare(request)
            await response.write(
                sse("snapshot", json_safe(self.snapshot()), retry_ms=RETRY_MS).encode()
            )
            while True:
                try:
                    first = await asyncio.wait_for(stream.queue.get(), KEEPALIVE_S)
                except TimeoutError:
                    first = ": keep-alive\n\n"
                batch = [first, *stream.take_all()]
                closing = None in batch
                await response.write("".join(m for m in batch if m is not None).encode())
                if closing:
                    break
        except ConnectionError:  # the page went away; its browser may come back
            pass
        finally:
            self._streams.discard(stream)
        return response

    def _session_of(self, request: web.Request) -> Session | None:
        return self.sessions.find(request.cookies.get(COOKIE))

    async def _session(self, request: web.Request) -> web.Response:
        session = self._session_of(request)
        if session is None:
            return _error(401, "nobody is logged in")
        return web.json_response({"user": session.user, "role": session.role, "csrf": session.csrf})

    async def _json_body(self, request: web.Request) -> dict[str, Any]:
        if request.content_type != "application/json":
            raise _BadRequest("send a JSON body (Content-Type: application/json)")
        try:
            body = await request.json()
        except (ValueError, UnicodeDecodeError):
            raise _BadRequest("the body is not valid JSON") from None
        if not isinstance(body, dict):
            raise _BadRequest("the body must be a JSON object")
        return body

    async def _login(self, request: web.Request) -> web.Response:
        if not self.users:
            return _error(403, "this page has no users file: nobody can log in (view only)")
        try:
            body = await self._json_body(request)
        except _BadRequest as error:
            return _error(400, str(error))
        name, password = body.get("user"), body.get("password")
        if not isinstance(name, str) or not isinstance(password, str) or not name:
            return _error(400, "give 'user' and 'password' as strings")
        async with self._logins:
            record = await asyncio.to_thread(self.users.authenticate, name, password)
        if record is None:
            _log.warning("live page: login refused for %r from %s", name, request.remote)
            return _error(401, "wrong user name or password")
        token, session = self.sessions.open(record.name, record.role)
        _log.info("live page: %s (%s) logged in from %s", record.name, record.role, request.remote)
        response = web.json_response(
            {"user": session.user, "role": session.role, "csrf": session.csrf}
        )
        response.set_cookie(
            COOKIE,
            token,
            max_age=int(self.sessions.lifetime_s),
            path="/",
            httponly=True,
            samesite="Strict",
            secure=self._tls,
        )
        return response

    async def _logout(self, request: web.Request) -> web.Response:
        session = self._session_of(request)
        if session is not None and not csrf_ok(session, request.headers.get("X-CSRF-Token")):
            return _error(403, "missing or wrong X-CSRF-Token header")
        self.sessions.close(request.cookies.get(COOKIE))
        response = web.json_response({"user": None})
        response.del_cookie(COOKIE, path="/")
        return response

    async def _act(self, request: web.Request) -> web.Response:
        unit_id, alarm, action = (request.match_info[k] for k in ("unit", "alarm", "action"))
        session = self._session_of(request)
        if session is None:
            return _error(401, "log in first: only a logged-in operator may act on alarms")
        if not csrf_ok(session, request.headers.get("X-CSRF-Token")):
            return _error(403, "missing or wrong X-CSRF-Token header")
        if session.role != "operator":
            return _error(
                403, f"{session.user} has the role {session.role}: only an operator may act"
            )
        if unit_id not in self._units:
            return _error(404, f"no unit {unit_id!r} on this page")
        if alarm not in self._alarms:
            return _error(404, f"no alarm {alarm!r}")
        if action not in ACTIONS:
            return _error(404, f"no action {action!r}: one of {', '.join(ACTIONS)}")
        try:
            body = await self._json_body(request)
            comment, duration_s = _action_arguments(body, action)
        except _BadRequest as error:
            return _error(400, str(error))
        wanted = OperatorAction(unit_id, alarm, action, session.user, comment, duration_s)  # type: ignore[arg-type]
        try:
            events: Sequence[AlarmEvent] = await self.operator_action(wanted)
        except ControllerError as error:
            _log.warning("live page: %s %s %s by %s refused: %s", unit_id, alarm, action,
                         session.user, error)  # fmt: skip
            return _error(409, str(error))
        _log.info("live page: %s %s %s by %s", unit_id, alarm, action, session.user)
        rows = [event_row(e, session.user) for e in events]
        self._units[unit_id].events.extend(rows)
        self._broadcast(sse("events", {"unit": unit_id, "events": rows}))
        return web.json_response({"events": rows}, dumps=_dumps)


class _BadRequest(ValueError):
    pass


def _dumps(value: object) -> str:
    return json.dumps(value, allow_nan=False)


def _action_arguments(body: Mapping[str, Any], action: str) -> tuple[str, float]:
    """The comment and (for a shelve) the duration of an action's body."""
    unknown = set(body) - {"comment", "duration_s"}
    if unknown:
        raise _BadRequest(f"unknown field(s): {', '.join(sorted(unknown))}")
    comment = body.get("comment", "")
    if not isinstance(comment, str):
        raise _BadRequest("'comment' must be a string")
    if len(comment) > MAX_COMMENT:
        raise _BadRequest(f"'comment' is longer than {MAX_COMMENT} characters")
    duration = body.get("duration_s")
    if action != "shelve":
        if duration is not None:
            raise _BadRequest(f"'duration_s' is for a shelve, not for {action}")
        return comment, math.nan
    if isinstance(duration, bool) or not isinstance(duration, int | float):
        raise _BadRequest("a shelve needs 'duration_s', a number of seconds")
    if isinstance(duration, int) and duration > MAX_SHELVE_S:
        raise _BadRequest(f"'duration_s' must be at most {MAX_SHELVE_S} s; got {duration}")
    if not (math.isfinite(duration) and duration > 0):
        raise _BadRequest(f"'duration_s' must be a positive number of seconds; got {duration}")
    return comment, float(duration)
