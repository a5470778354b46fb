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


def _module_imports(path: Path, package: str) -> set[str]:
    """Return the modules of ``package`` that ``path`` imports, at its top or in functions."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            parts = node.module.split(".")
            if parts[0] != package:
                continue
            if len(parts) > 1:
                found.add(".".join(parts[:2]))
            else:  # from monitor import water, batchfit
                found |= {f"{package}.{alias.name}" for alias in node.names}
        elif isinstance(node, ast.Import):
            for alias in node.names:
                parts = alias.name.split(".")
                if parts[0] == package and len(parts) > 1:
                    found.add(".".join(parts[:2]))
    return found


@pytest.mark.parametrize("package", sorted(FORBIDDEN))
def test_no_import_circle_inside_a_package(package):
    """Issue 15: ``replay -> logs -> live -> replay`` was held apart only by imports
    inside functions. Imports inside functions count here too."""
    graph = {
        f"{package}.{path.stem}": _module_imports(path, package) - {f"{package}.{path.stem}"}
        for path in sorted((ROOT / package).glob("*.py"))
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
