"""The live service's OPC UA side: the plant client, sigmatrack's own server, their security.

- :mod:`~sensor.shell.opcua.tags`: the configured tags, their types, the conversion to
  sigmatrack's units and the timestamp checks
- :mod:`~sensor.shell.opcua.plant_client`: :class:`PlantClient`, subscriptions to the plant's
  tags, samples on a tick, the guard-gated writes, reconnection with capped backoff
- :mod:`~sensor.shell.opcua.advisor_server`: :class:`AdvisorServer`, the estimates, proposals,
  guard, health and alarms of every unit, as variables and events
- :mod:`~sensor.shell.opcua.security`, :mod:`~sensor.shell.opcua.credentials`,
  :mod:`~sensor.shell.opcua.users`: certificates, trust lists, passwords, users and roles

The core never imports this package.
"""
