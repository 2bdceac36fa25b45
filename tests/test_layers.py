"""The package's layers only point down, and the numerics stay free of the I/O stack.

Every ``import`` of every module (at the top, inside functions and under
``TYPE_CHECKING`` alike) is read with :mod:`ast` and checked against the layer order
documented in DEVELOPERS.md.  There is no list of exceptions: an upward edge fails.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "ensemble"

LAYERS: tuple[tuple[str, ...], ...] = (
    # leaf modules: shared vocabulary, importing nothing above them
    ("about", "errors", "records", "methods", "distributions", "durable", "examples"),
    ("scenario",),
    ("model",),
    ("sampling",),
    ("integrate",),
    ("output",),
    ("run",),
    ("present", "fit"),
    ("api",),
    ("cli", "__main__", "__init__"),
)
"""Layers from the bottom up, by the first name below ``ensemble.``; a module may import
its own layer and the layers below it."""

NUMERICS = ("about", "errors", "records", "methods", "distributions", "durable", "scenario",
            "model", "sampling", "integrate")
"""Layers that take and return numpy arrays and never import the I/O or parallel stack."""

IO_STACK = ("dask", "distributed", "dask_jobqueue", "xarray", "netCDF4", "matplotlib",
            "typer", "pandas")


def layer_of(part: str) -> int:
    for level, names in enumerate(LAYERS):
        if part in names:
            return level
    raise AssertionError(f"ensemble.{part} is in no layer of LAYERS: add it")


def modules() -> list[tuple[str, Path]]:
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        relative = path.relative_to(PACKAGE).with_suffix("")
        parts = relative.parts
        found.append((parts[0] if parts != ("__init__",) else "__init__", path))
    return found


def imported_names(path: Path) -> list[tuple[int, str]]:
    """(line, dotted module name) of every import in the file, relative ones resolved."""
    tree = ast.parse(path.read_text(), filename=str(path))
    package = ["ensemble", *path.relative_to(PACKAGE).parent.parts]
    names: list[tuple[int, str]] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.extend((node.lineno, alias.name) for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[:len(package) - node.level + 1]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            if module == "ensemble":
                # ``from ensemble import api``: the names are modules of the package
                names.extend((node.lineno, f"ensemble.{alias.name}") for alias in node.names)
            else:
                names.append((node.lineno, module))
    return names


def test_every_module_is_in_a_layer() -> None:
    for part, _ in modules():
        layer_of(part)


@pytest.mark.parametrize("part,path", modules(), ids=lambda value: str(value))
def test_imports_only_point_down(part: str, path: Path) -> None:
    level = layer_of(part)
    upward = []
    for line, name in imported_names(path):
        pieces = name.split(".")
        if pieces[0] != "ensemble" or len(pieces) == 1:
            continue
        if layer_of(pieces[1]) > level:
            upward.append(f"{path.relative_to(PACKAGE.parent)}:{line} imports {name}")
    assert not upward, "upward imports:\n" + "\n".join(upward)


@pytest.mark.parametrize("part,path", [m for m in modules() if m[0] in NUMERICS],
                         ids=lambda value: str(value))
def test_numerics_do_not_import_the_io_stack(part: str, path: Path) -> None:
    heavy = [f"{path.relative_to(PACKAGE.parent)}:{line} imports {name}"
             for line, name in imported_names(path) if name.split(".")[0] in IO_STACK]
    assert not heavy, "\n".join(heavy)


def test_the_check_sees_an_upward_edge(tmp_path: Path) -> None:
    """The reader of imports is itself checked on a module that imports upward."""
    fake = PACKAGE / "model" / "lower.py"
    names = [name for _, name in imported_names(fake)]
    assert any(name.startswith("ensemble.scenario") for name in names)
    assert layer_of("output") > layer_of("model")
