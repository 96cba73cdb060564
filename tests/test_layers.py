"""The layers of DESIGN §2: imports point down only, and the numeric core does no I/O."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "calib"

# layer -> the calib packages it may not import
_ABOVE_STORE = ("workflows", "cli", "api", "client")
FORBIDDEN: dict[str, tuple[str, ...]] = {
    "model": ("store", "estimate", "calibrate", "record", "policy", "output", *_ABOVE_STORE),
    "record": ("store", "estimate", "calibrate", "policy", "output", *_ABOVE_STORE),
    "estimate": ("store", "calibrate", "policy", "output", *_ABOVE_STORE),
    "calibrate": ("store", "estimate", "policy", "output", *_ABOVE_STORE),
    "policy": ("store", "output", *_ABOVE_STORE),
    "output": ("store", *_ABOVE_STORE),
    "store": ("policy", "output", *_ABOVE_STORE),
    "inputs": ("store", "estimate", "calibrate", "policy", "output", *_ABOVE_STORE),
    "workflows": ("cli", "api"),
    "hedge": ("store", "estimate", "calibrate", "policy", "output", *_ABOVE_STORE),
    "compute": (
        *("model", "record", "store", "estimate", "calibrate", "policy", "output", "inputs"),
        *("hedge", *_ABOVE_STORE),
    ),
}
"""``record`` (the stored-fit contract and its JSON codec) sits just above ``model``;
``policy`` (settings file, gates) and ``output`` (what calib shows people) are pure: no
database; workflows, the CLI and the API use them. ``compute`` (where units of work run:
this process, local processes, a cluster) is below them all."""
NUMERIC = ("model", "estimate", "calibrate", "hedge")
PURE = ("record", "policy")
"""Packages that never touch the database (``policy`` reads its settings file, so files
are allowed there)."""
IO_MODULES = ("pathlib", "sqlalchemy", "pandas", "csv", "sqlite3", "shutil", "tomllib")


TYPES_ONLY = frozenset({"output"})
"""Layers that may name the store's record types for annotations (``if TYPE_CHECKING:``)
while importing nothing of it at run time: they are handed the records."""


def _type_checking_blocks(tree: ast.AST) -> set[int]:
    return {
        id(child)
        for node in ast.walk(tree)
        if isinstance(node, ast.If)
        and isinstance(node.test, ast.Name)
        and node.test.id == "TYPE_CHECKING"
        for stmt in node.body
        for child in ast.walk(stmt)
    }


def _imports(path: Path, *, runtime_only: bool = False) -> list[str]:
    names: list[str] = []
    tree = ast.parse(path.read_text(), filename=str(path))
    skip = _type_checking_blocks(tree) if runtime_only else set()
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.Import):
            names.extend(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.append(node.module)
    return names


def _modules(layer: str) -> list[Path]:
    return sorted((ROOT / layer).rglob("*.py"))


@pytest.mark.parametrize("layer", sorted(FORBIDDEN))
def test_imports_point_down(layer: str) -> None:
    bad = [
        f"{path.relative_to(ROOT.parent)} imports {name}"
        for path in _modules(layer)
        for name in _imports(path, runtime_only=layer in TYPES_ONLY)
        if any(name == f"calib.{up}" or name.startswith(f"calib.{up}.") for up in FORBIDDEN[layer])
    ]
    assert not bad, "\n".join(bad)


@pytest.mark.parametrize("layer", NUMERIC)
def test_numeric_core_does_no_io(layer: str) -> None:
    bad: list[str] = []
    for path in _modules(layer):
        tree = ast.parse(path.read_text(), filename=str(path))
        bad += [
            f"{path.relative_to(ROOT.parent)} imports {name}"
            for name in _imports(path)
            if name.split(".")[0] in IO_MODULES
        ]
        bad += [
            f"{path.relative_to(ROOT.parent)}:{node.lineno} calls open()"
            for node in ast.walk(tree)
            if isinstance(node, ast.Call)
            and isinstance(node.func, ast.Name)
            and node.func.id == "open"
        ]
    assert not bad, "\n".join(bad)


def test_every_layer_exists() -> None:
    for layer in FORBIDDEN:
        assert _modules(layer), f"calib/{layer} has no modules"


@pytest.mark.parametrize("layer", PURE)
def test_pure_layers_touch_no_database(layer: str) -> None:
    bad = [
        f"{path.relative_to(ROOT.parent)} imports {name}"
        for path in _modules(layer)
        for name in _imports(path)
        if name.split(".")[0] in ("sqlalchemy", "sqlite3", "psycopg")
    ]
    assert not bad, "\n".join(bad)


def test_output_package_is_one_docstring() -> None:
    text = (ROOT / "output" / "__init__.py").read_text()
    line = "Output layer: what calib shows people (HTML pages, figures, tables, terminal text)."
    assert text == f'"""{line}"""\n'
