"""The house's import rules: no circle among the project's modules, and the daemon never
imports the simulator."""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = {"trimtab": ROOT / "daemon" / "trimtab",
            "trimtab_sim": ROOT / "simulator" / "trimtab_sim"}


def _module(package: str, path: Path, base: Path) -> str:
    parts = path.relative_to(base).with_suffix("").parts
    name = ".".join((package, *parts))
    return name.removesuffix(".__init__")


def _graph() -> dict[str, set[str]]:
    """Module → the project's modules it imports anywhere (top level, functions, TYPE_CHECKING)."""
    modules: dict[str, Path] = {}
    for package, base in PACKAGES.items():
        for path in base.rglob("*.py"):
            modules[_module(package, path, base)] = path
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        deps: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.module:
                targets = [node.module] + [f"{node.module}.{a.name}" for a in node.names]
            elif isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            else:
                continue
            deps |= {t for t in targets if t in modules and t != name}
        # a package's own __init__ is not an edge worth a circle
        graph[name] = {d for d in deps if not name.startswith(d + ".")}
    return graph


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import circle, as the modules along it, or None."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        stack.append(node)
        for dep in sorted(graph[node]):
            if state.get(dep) == 1:
                return [*stack[stack.index(dep):], dep]
            if dep not in state:
                found = visit(dep)
                if found:
                    return found
        stack.pop()
        state[node] = 2
        return None

    for node in sorted(graph):
        if node not in state:
            found = visit(node)
            if found:
                return found
    return None


def test_no_import_circle() -> None:
    """No module imports itself through others, not even for type checking only."""
    assert _cycle(_graph()) is None, " -> ".join(_cycle(_graph()) or [])


def test_the_daemon_never_imports_the_simulator() -> None:
    """trimtab runs on gateways without the simulator."""
    graph = _graph()
    bad = sorted(f"{m} -> {d}" for m, deps in graph.items() if m.startswith("trimtab.")
                 for d in deps if d.startswith("trimtab_sim"))
    assert bad == []


def test_the_check_finds_a_circle() -> None:
    """The circle finder itself reports a loop it is given."""
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert _cycle({"a": {"b"}, "b": set()}) is None


LAYERS = ("base", "model", "wire", "store", "config", "engine", "tune", "service", "commands",
          "cli")
"""The daemon's floors, lowest first. A module imports only from its own floor or below; tune
and service stand side by side and import neither each other. ``base`` is the package's
top-level vocabulary (errors, messages, logs)."""
SIDE_BY_SIDE = {frozenset({"tune", "service"})}


def _floor(module: str) -> str:
    parts = module.split(".")
    if len(parts) == 1:
        return "base"
    if parts[1] in LAYERS:
        return parts[1]
    return "cli" if parts[1] in {"cli", "__main__"} else "base"


def _upward(graph: dict[str, set[str]]) -> list[str]:
    bad = []
    for m, deps in graph.items():
        if not m.startswith("trimtab.") and m != "trimtab":
            continue
        for d in deps:
            if d.startswith("trimtab_sim") or d == "trimtab":
                continue
            a, b = _floor(m), _floor(d)
            if (frozenset({a, b}) in SIDE_BY_SIDE
                    or LAYERS.index(b) > LAYERS.index(a)):
                bad.append(f"{m} ({a}) -> {d} ({b})")
    return sorted(bad)


def test_imports_only_go_down_the_floors() -> None:
    """No module of a lower floor (model, wire, store, config, engine, …) imports a higher one."""
    assert _upward(_graph()) == []


def test_every_daemon_module_sits_on_a_floor() -> None:
    """Each module lives in a sub-package named in LAYERS, or is one of the base modules."""
    base = {"trimtab", "trimtab.errors", "trimtab.messages", "trimtab.logs", "trimtab.cli",
            "trimtab.__main__"}
    loose = sorted(m for m in _graph() if m.startswith("trimtab") and not m.startswith(
        "trimtab_sim") and m not in base and m.split(".")[1] not in LAYERS)
    assert loose == []


def test_the_floor_check_finds_an_upward_import() -> None:
    """The floor check reports a model module importing the engine, and tune importing service."""
    graph = {"trimtab.model.online": {"trimtab.engine.engine"},
             "trimtab.tune.tuner": {"trimtab.service.daemon"},
             "trimtab.engine.engine": {"trimtab.model.online"}}
    assert _upward(graph) == [
        "trimtab.model.online (model) -> trimtab.engine.engine (engine)",
        "trimtab.tune.tuner (tune) -> trimtab.service.daemon (service)",
    ]
