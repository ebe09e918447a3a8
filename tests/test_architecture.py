"""The layering fixed by the design card (DESIGN.md), checked on the import statements.

- ``controller`` imports nothing of ours: the law is handed callables.
- the science modules of ``sensor`` (``sensor/*.py``) never import the shell (``sensor.shell``):
  no I/O in the core.
- ``sensor`` never imports ``simulators`` (the plant is a separate system).
- ``simulators`` imports only the thermodynamics and site-file types of ``sensor``, never its
  estimation model or filter, so tests never estimate with the model that made the data.
- no import cycles between modules.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from tests.conftest import REPO

PACKAGES = ("sensor", "controller", "simulators")

SIMULATOR_MAY_IMPORT = {
    "sensor",
    "sensor.errors",
    "sensor.numerics",
    "sensor.units",
    "sensor.solubility",
    "sensor.metastable",
    "sensor.massbalance",
    "sensor.shell",
    "sensor.shell.config",
    "sensor.shell.tomlschema",
    "sensor.shell.labdata",
    "sensor.shell.sitemodels",
}


def _module_name(path: Path) -> str:
    parts = path.relative_to(REPO).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {}
    for package in PACKAGES:
        for path in sorted((REPO / package).rglob("*.py")):
            name = _module_name(path)
            found: set[str] = set()
            for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
                if isinstance(node, ast.Import):
                    found.update(alias.name for alias in node.names)
                elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                    found.add(node.module)
                    found.update(f"{node.module}.{alias.name}" for alias in node.names)
            graph[name] = {m for m in found if m.split(".")[0] in PACKAGES}
    modules = set(graph)
    # "from sensor import units" names a module; "from sensor.units import x" names an attribute.
    return {name: {m for m in deps if m in modules} for name, deps in graph.items()}


GRAPH = _imports()


def test_found_the_packages():
    assert {"sensor.solubility", "sensor.shell.cli", "controller"} <= set(GRAPH)


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if m.startswith("controller")))
def test_controller_imports_nothing_of_ours(module):
    assert {m for m in GRAPH[module] if not m.startswith("controller")} == set()


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if m.startswith("sensor")))
def test_sensor_never_imports_the_simulator(module):
    assert not any(m.startswith("simulators") for m in GRAPH[module])


@pytest.mark.parametrize(
    "module",
    sorted(m for m in GRAPH if m.startswith("sensor.") and not m.startswith("sensor.shell")),
)
def test_science_core_never_imports_the_shell(module):
    assert not any(m.startswith("sensor.shell") for m in GRAPH[module])


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if m.startswith("simulators")))
def test_simulator_uses_only_thermodynamics_and_site_types(module):
    used = {m for m in GRAPH[module] if m.startswith("sensor")}
    assert used <= SIMULATOR_MAY_IMPORT, used - SIMULATOR_MAY_IMPORT


def test_no_import_cycles():
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> None:
        state[node] = 1
        stack.append(node)
        for dep in GRAPH.get(node, ()):
            if state.get(dep) == 1:
                cycle = [*stack[stack.index(dep) :], dep]
                pytest.fail("import cycle: " + " -> ".join(cycle))
            if dep not in state:
                visit(dep)
        stack.pop()
        state[node] = 2

    for module in sorted(GRAPH):
        if module not in state:
            visit(module)
