"""Who may import whom (the design's layers), read from the source files' imports.

* ``stages/kernels/**`` imports nothing from Prefect, Zarr or fsspec, and from
  ``atomline.stages`` only the kernels and ``errors``;
* no module of ``stages/`` imports ``atomline.flows``;
* the modules of ``stages/`` and ``flows/`` import one another without a cycle;
* importing the scikit-learn transformer loads neither Prefect nor Zarr.

For the layer rules every ``import`` statement counts, also those inside functions: a
deferred import still ties the layers together. The cycle rule is about loading: it reads
the imports that run when a module is loaded (module and class bodies, not functions).
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
#: Source folders and the packages they are installed as (pyproject's package-dir).
PACKAGES = {"stages": "atomline.stages", "flows": "atomline.flows"}


def _modules() -> dict[str, Path]:
    """Dotted module name → source file, for every module of the two packages."""
    found = {}
    for folder, package in PACKAGES.items():
        for path in sorted((ROOT / folder).rglob("*.py")):
            parts = path.relative_to(ROOT / folder).with_suffix("").parts
            if parts[-1] == "__init__":
                parts = parts[:-1]
            found[".".join((package, *parts))] = path
    return found


MODULES = _modules()


def _nodes(tree: ast.AST, loading_only: bool):
    """Every node of ``tree``; with ``loading_only``, none inside a function body."""
    todo = [tree]
    while todo:
        node = todo.pop()
        yield node
        if loading_only and isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda)):
            continue
        todo.extend(ast.iter_child_nodes(node))


def _imports(name: str, path: Path, loading_only: bool = False) -> set[str]:
    """Absolute names a module imports (``from a import b`` counts ``a.b`` when it is a
    module of ours, else ``a``); relative imports resolved against the module's package.
    With ``loading_only``, only the imports run when the module is loaded."""
    is_package = path.name == "__init__.py"
    package = name if is_package else name.rpartition(".")[0]
    names: set[str] = set()
    for node in _nodes(ast.parse(path.read_text(), str(path)), loading_only):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                source = ".".join(base + ([node.module] if node.module else []))
            else:
                source = node.module
            for alias in node.names:
                sub = f"{source}.{alias.name}"
                names.add(sub if sub in MODULES else source)
    return names


IMPORTS = {name: _imports(name, path) for name, path in MODULES.items()}
LOADING = {name: _imports(name, path, loading_only=True) for name, path in MODULES.items()}


def _within(name: str, prefix: str) -> bool:
    return name == prefix or name.startswith(prefix + ".")


def test_the_import_reader_sees_relative_and_deferred_imports():
    # The rules below are only as good as this reader: check it on known lines.
    assert "atomline.stages.errors" in IMPORTS["atomline.stages.kernels.coding"]  # from ...errors
    assert "atomline.stages.kernels.coding._rows" in IMPORTS["atomline.stages.kernels.coding._common"]
    assert "prefect" in IMPORTS["atomline.stages.train"]
    assert "atomline.stages.workspace" in IMPORTS["atomline.flows.pipeline"]
    # train_encoder imports fit_learned_encoder inside the function: deferred, not loading.
    assert "atomline.stages.kernels.coding" in IMPORTS["atomline.stages.train"]
    assert "atomline.stages.kernels.coding" not in LOADING["atomline.stages.train"]


KERNEL_MODULES = [n for n in MODULES if _within(n, "atomline.stages.kernels")]


@pytest.mark.parametrize("name", KERNEL_MODULES)
def test_kernels_import_no_io_and_no_stage(name):
    bad = sorted(
        i for i in IMPORTS[name]
        if any(_within(i, lib) for lib in ("prefect", "zarr", "fsspec"))
        or (_within(i, "atomline") and not (_within(i, "atomline.stages.kernels")
                                             or i == "atomline.stages.errors"))
    )
    assert bad == [], f"{name} imports {bad}"


@pytest.mark.parametrize("name", [n for n in MODULES if _within(n, "atomline.stages")])
def test_stages_do_not_import_flows(name):
    assert sorted(i for i in IMPORTS[name] if _within(i, "atomline.flows")) == []


def _cycle() -> list[str] | None:
    """One import cycle among our modules (as a path), or None."""
    graph = {n: sorted(i for i in LOADING[n] if i in MODULES and i != n) for n in MODULES}
    state: dict[str, int] = {}  # 1: on the current path, 2: finished
    path: list[str] = []

    def visit(n: str) -> list[str] | None:
        state[n] = 1
        path.append(n)
        for m in graph[n]:
            if state.get(m) == 1:
                return path[path.index(m):] + [m]
            if m not in state:
                found = visit(m)
                if found:
                    return found
        path.pop()
        state[n] = 2
        return None

    for n in graph:
        if n not in state:
            found = visit(n)
            if found:
                return found
    return None


def test_no_import_cycles():
    assert _cycle() is None, " -> ".join(_cycle() or [])


def test_the_transformer_loads_neither_prefect_nor_zarr():
    # In a fresh interpreter, so that nothing imported by other tests counts.
    code = ("import sys, atomline.stages.estimator; "
            "print(sorted(m for m in ('prefect', 'zarr') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
