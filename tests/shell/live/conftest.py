"""The live page's fixtures: the synthetic scene (built once per session: it runs the soft
sensor over a short batch)."""

from __future__ import annotations

import copy

import pytest

from tests.shell.live.scene import Scene, demo_scene


@pytest.fixture(scope="session")
def scene_steps() -> Scene:
    return demo_scene()


@pytest.fixture
def scene(scene_steps: Scene) -> Scene:
    """A fresh scene: the session's steps, a copy of its alarm engine, no actions yet."""
    engine = copy.deepcopy(scene_steps.engine)
    return Scene(scene_steps.site, scene_steps.definitions, engine, scene_steps.outputs)
