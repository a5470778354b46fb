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
