"""Seams of the workspace package: one module reaches into Zarr's internals, the facade
keeps every public name, and no concept's class outgrows a reader's attention."""

from __future__ import annotations

import ast
from pathlib import Path

import atomline.stages.workspace as workspace

ROOT = Path(workspace.__file__).resolve().parents[2]  # the source tree holding stages/ and flows/


def _imports(path: Path) -> set[str]:
    names = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module)
    return names


def test_only_the_zarr_module_imports_zarr_internals():
    files = sorted((ROOT / "stages").rglob("*.py")) + sorted((ROOT / "flows").rglob("*.py"))
    assert len(files) > 20  # the scan found the package, not an empty folder
    offenders = [str(f.relative_to(ROOT)) for f in files
                 if f.name != "_zarr.py" and any(m == "zarr.core" or m.startswith("zarr.core.")
                                                 for m in _imports(f))]
    assert offenders == []
    assert "zarr.core.sync" in _imports(ROOT / "stages" / "workspace" / "_zarr.py")


def test_facade_exports_every_public_name():
    for name in workspace.__all__:
        assert getattr(workspace, name) is not None, name
    # The lease registry is one set, shared by the facade and the lease module.
    from atomline.stages.workspace import leases
    assert workspace._HELD_LEASES is leases._HELD_LEASES


def test_no_class_of_the_package_is_over_300_lines():
    long = []
    for path in sorted((ROOT / "stages" / "workspace").glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ClassDef) and node.end_lineno - node.lineno + 1 > 300:
                long.append(f"{path.name}:{node.name} ({node.end_lineno - node.lineno + 1} lines)")
    assert long == []
