"""The one direction of imports: dashboard -> monitor -> drivers, never back."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
FORBIDDEN = {"drivers": {"monitor", "dashboard"}, "monitor": {"dashboard"}, "dashboard": set()}


def _imported_packages(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {alias.name.split(".")[0] for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module.split(".")[0])
    return names


@pytest.mark.parametrize("package", sorted(FORBIDDEN))
def test_imports_go_one_way(package):
    files = sorted((ROOT / package).rglob("*.py"))
    assert files, f"no sources in {package}/"
    for path in files:
        wrong = _imported_packages(path) & FORBIDDEN[package]
        assert not wrong, f"{path.relative_to(ROOT)} imports {sorted(wrong)}"


def _module_name(path: Path) -> str:
    """Return the dotted module name of a source file (a package's ``__init__`` is the package)."""
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _module_imports(path: Path, package: str, modules: set[str]) -> set[str]:
    """Return the modules of ``package`` that ``path`` imports, at its top or in functions.

    ``modules`` are the package's module names, subpackages' included: an import names
    the longest of them it reaches (``from drivers.simworld.rig import X`` is
    ``drivers.simworld.rig``; ``from monitor.physics import water`` is ``monitor.physics.water``).
    """

    def known(name: str) -> str:
        while name not in modules and "." in name:
            name = name.rsplit(".", 1)[0]
        return name

    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if node.module.split(".")[0] != package:
                continue
            for alias in node.names:
                name = f"{node.module}.{alias.name}"
                found.add(name if name in modules else known(node.module))
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == package:
                    found.add(known(alias.name))
    return found


@pytest.mark.parametrize("package", sorted(FORBIDDEN))
def test_no_import_circle_inside_a_package(package):
    """Issue 15: ``replay -> logs -> live -> replay`` was held apart only by imports
    inside functions. Imports inside functions count here too, and so do subpackages
    (``drivers/simworld/``): a module there that imported its own package's
    ``__init__`` would close a circle through the names the package imports."""
    paths = sorted((ROOT / package).rglob("*.py"))
    modules = {_module_name(path) for path in paths}
    graph = {
        _module_name(path): _module_imports(path, package, modules) - {_module_name(path)}
        for path in paths
    }

    def cycle_from(start: str) -> list[str] | None:
        stack = [(start, [start])]
        seen: set[str] = set()
        while stack:
            node, trail = stack.pop()
            for nxt in sorted(graph.get(node, ())):
                if nxt == start:
                    return [*trail, start]
                if nxt not in seen:
                    seen.add(nxt)
                    stack.append((nxt, [*trail, nxt]))
        return None

    for module in graph:
        circle = cycle_from(module)
        assert circle is None, " -> ".join(circle)


#: ``monitor``'s subpackages from the bottom up (DEVELOPERS.md has the map). A module may
#: import its own subpackage and those of lower layers only; ``rig`` and ``reports`` share
#: a layer and import neither each other.
MONITOR_LAYERS = (("physics",), ("estimation",), ("records",), ("runs",), ("rig", "reports"),
                  ("engine",), ("cli",))  # fmt: skip


def _monitor_part(name: str) -> str:
    return name.split(".")[1] if name.count(".") else name


def test_monitor_subpackages_import_downwards_only():
    """Issue 15: the layout shows the architecture, with one direction of imports."""
    level = {part: i for i, layer in enumerate(MONITOR_LAYERS) for part in layer}
    paths = sorted((ROOT / "monitor").rglob("*.py"))
    modules = {_module_name(path) for path in paths}
    placed = {_monitor_part(m) for m in modules} - {"monitor", "__init__"}
    assert placed <= set(level), f"subpackages or modules not in a layer: {placed - set(level)}"
    wrong = []
    for path in paths:
        name = _module_name(path)
        own = _monitor_part(name)
        if own not in level:
            continue  # monitor/__init__.py
        for target in _module_imports(path, "monitor", modules):
            other = _monitor_part(target)
            if other == own or other not in level:
                continue
            if level[other] >= level[own]:
                wrong.append(f"{name} imports {target}")
    assert not wrong, "; ".join(wrong)
