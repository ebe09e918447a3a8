"""The live service, ``sigmatrack run``: the plant client, each unit's pipeline, sigmatrack's
own OPC UA server and the store, joined on a clock tick.

- :mod:`~sensor.shell.service.clock`: the wall clock, or a simulated plant's clock
- :mod:`~sensor.shell.service.records`: the steps' results as the store's rows, in one place
- :mod:`~sensor.shell.service.units`: one unit: its pipeline, its batch, its checkpoints
- :mod:`~sensor.shell.service.service`: :class:`~sensor.shell.service.service.Service`
- :mod:`~sensor.shell.service.console`: the console view of the demo
"""
