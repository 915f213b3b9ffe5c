"""Imports in harness/ only run downward: the layers DEVELOPERS.md names, checked on every module."""

from __future__ import annotations

import ast

import pytest

from conftest import REPO

# Lowest first; a module imports its own group or a lower layer (DEVELOPERS.md, "Layout").
LAYERS = [
    ("ground",),
    ("metrics",),
    ("datasets", "embed", "geometry", "track"),
    ("sweep",),
    ("score",),
    ("engine",),
    ("review",),
    ("cli",),
]
TOP_GROUPS = {
    "harness": "ground",
    "errors": "ground",
    "_settings": "ground",
    "_yaml_lines": "ground",
    "keys": "ground",
    "_crashpoints": "ground",
    "_lazy": "ground",
    "plots": "ground",
    "cd_diagram": "ground",
    "metrics": "metrics",
    "datasets": "datasets",
    "sweep": "sweep",
    "schema": "sweep",
    "cli": "cli",
    "__main__": "cli",
}
SUBPACKAGES = {"embed", "engine", "geometry", "review", "score", "track"}
RANK = {group: rank for rank, layer in enumerate(LAYERS) for group in layer}
MODULES = sorted((REPO / "harness").rglob("*.py"))


def module_name(path):
    parts = path.relative_to(REPO).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def group(module):
    parts = module.split(".")
    if len(parts) >= 2 and parts[1] in SUBPACKAGES:
        return parts[1]
    return TOP_GROUPS.get(parts[1] if len(parts) > 1 else "harness")


def imported(path):
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom) and node.level == 0 and (node.module or "").startswith("harness"):
            yield node.module
        elif isinstance(node, ast.Import):
            yield from (a.name for a in node.names if a.name.startswith("harness"))


def test_every_module_has_a_layer():
    assert [m for m in map(module_name, MODULES) if group(m) not in RANK] == []


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(REPO)))
def test_imports_run_downward(path):
    own = group(module_name(path))
    upward = [m for m in imported(path) if group(m) != own and RANK[group(m)] >= RANK[own]]
    assert upward == [], f"{own} imports {upward}"
