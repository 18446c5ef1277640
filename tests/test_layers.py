"""The package's layers: imports point down only, no import circles, no borrowed private names.

The layer order is written in docs/architecture.md: the ground modules (errors, dims,
threads), then data -> model -> infer -> evaluate -> workflow. A module may import from its
own layer or a lower one. The rules are read off the source with :mod:`ast`, so the test
fails on the import statement itself, wherever it stands (also inside a function).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "bayeslong"

#: Rank of each top-level part of the package; a module imports only equal or lower ranks.
LAYERS = {"errors": 0, "dims": 0, "threads": 0, "wording": 0, "arguments": 0, "models": 0,
          "data": 1, "model": 2, "infer": 3, "evaluate": 4, "workflow": 5}

#: Largest module, in lines (a file that grows past it is two concepts).
MAX_LINES = 720


def _modules():
    return sorted(p for p in PACKAGE.rglob("*.py") if p.name != "__init__.py" or p.parent != PACKAGE)


def _name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(path: Path):
    """(line, imported module, imported names) of every bayeslong import in ``path``."""
    for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0 \
                and node.module.split(".")[0] == "bayeslong":
            yield node.lineno, node.module, [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level > 0:
            yield node.lineno, "<relative>", [a.name for a in node.names]
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == "bayeslong":
                    yield node.lineno, alias.name, []


def _layer(module: str) -> str:
    return module.split(".")[1]


def test_every_top_level_part_has_a_layer():
    parts = {p.name.removesuffix(".py") for p in PACKAGE.iterdir()
             if (p.suffix == ".py" and p.name != "__init__.py") or (p.is_dir() and p.name != "__pycache__")}
    assert parts <= set(LAYERS), f"not in the layer table: {sorted(parts - set(LAYERS))}"


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_imports_point_down_only(path):
    me = _name(path)
    for line, module, names in _imports(path):
        assert module != "<relative>", f"{me}:{line} uses a relative import; write bayeslong.<...>"
        if module == "bayeslong":
            pytest.fail(f"{me}:{line} imports the package root (the public API) from inside it")
        assert LAYERS[_layer(module)] <= LAYERS[_layer(me)], (
            f"{me}:{line} imports {module}: layer {_layer(me)!r} may not import the higher "
            f"layer {_layer(module)!r}")


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_no_module_borrows_another_modules_private_name(path):
    me = _name(path)
    for line, module, names in _imports(path):
        private = [n for n in names if n.startswith("_")]
        assert module == me or not private, (
            f"{me}:{line} imports private {private} from {module}: promote the name or move it")


def test_no_import_circles_between_modules():
    known = {_name(p) for p in _modules()}

    def targets(path):
        # `from bayeslong.data import intake` depends on the module bayeslong.data.intake
        for _, module, names in _imports(path):
            subs = {f"{module}.{n}" for n in names} & known
            yield from subs or ({module} & known)

    graph = {_name(p): set(targets(p)) for p in _modules()}
    state: dict = {}

    def visit(node, trail):
        if state.get(node) == "done":
            return
        if state.get(node) == "open":
            circle = trail[trail.index(node):] + [node]
            pytest.fail("import circle: " + " -> ".join(circle))
        state[node] = "open"
        for nxt in sorted(graph[node]):
            visit(nxt, trail + [node])
        state[node] = "done"

    for node in sorted(graph):
        visit(node, [])


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_module_stays_small(path):
    n = len(path.read_text().splitlines())
    assert n <= MAX_LINES, f"{path.relative_to(PACKAGE)} has {n} lines; split it by concept"


def test_data_and_model_layers_never_import_pymc():
    for path in _modules():
        if _layer(_name(path)) in ("data", "model") or _layer(_name(path)) in ("errors", "dims", "threads"):
            text = path.read_text()
            for word in ("import pymc", "from pymc", "import pytensor", "from pytensor"):
                if word in text and _name(path) != "bayeslong.model.moments":
                    pytest.fail(f"{_name(path)} mentions {word!r}: only the infer layer builds "
                                "PyMC models")
