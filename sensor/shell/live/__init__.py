"""The live trend page: what operators and engineers watch in a browser while batches run.

What the service wires (``sigmatrack run`` / ``demo``)::

    from sensor.shell.live.server import LivePage, site_diagrams

    async with LivePage(
        site.live,                          # [live]: host, port, window, users file, HTTPS
        site_diagrams(site, zone),          # each unit's phase-diagram lines, from the zone
        crystallizer_alarms(settings),      # the alarms' help texts and priorities
        operator_action,                    # the OPC UA server's OperatorHandler, the same one
        title=site.site.name,
    ) as page:
        ...
        page.publish(unit_id, outputs)      # per step, the same UnitOutputs as AdvisorServer

``publish`` never waits (a page that falls behind is disconnected and reconnects); it raises
:class:`~sensor.shell.live.errors.LivePageError` for an unknown unit or a step time going
back. ``page.url`` is where it listens (``page.port`` the port chosen for ``port = 0``).

- :mod:`~sensor.shell.live.server`: the HTTP server (aiohttp), routes, logins and actions
- :mod:`~sensor.shell.live.page`: the page's HTML, style sheet and script (all inline)
- :mod:`~sensor.shell.live.state`: a unit's outputs, alarms and events as JSON
- :mod:`~sensor.shell.live.trend`: the bounded, decimated trend buffer
- :mod:`~sensor.shell.live.auth`: sessions and CSRF tokens
- :mod:`~sensor.shell.live.errors`: ``LivePageError``

sigmatrack advises only: the page is for people. The DCS keeps the temperature loop and the
recipe; the safety instrumented system keeps protection.
"""
