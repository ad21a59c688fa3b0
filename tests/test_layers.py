"""Architecture: data flow one way, and light imports (STYLE.md, layering by concern)."""

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "pmap"

# Lower number = lower layer. A module may import only from its own layer or below.
LAYERS = {
    "errors": 0, "conventions": 0, "airvac": 0, "_version": 0, "provenance": 0, "steps": 0, "cube": 0,
    "_progress": 0, "noise": 0, "_style": 0, "_layout": 0,
    "io": 1, "synthetic": 1, "_cubeinfo": 1,
    "scenes": 1,
    "spectral": 2, "stack": 2,
    "fitting": 3, "decomposition": 3, "series": 3, "planck": 3,
    "results": 4,
    "pipeline": 5,
    "cli": 6, "report": 6, "report_html": 6, "report_series": 6, "export": 6, "napari_plugin": 6, "__main__": 6, "__init__": 6,
}


def _top(mod_path: Path) -> str:
    rel = mod_path.relative_to(PKG)
    return rel.parts[0].removesuffix(".py")


def _imported_pmap_modules(path: Path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    pkg_parts = path.relative_to(PKG.parent).with_suffix("").parts[:-1]
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = list(pkg_parts[: len(pkg_parts) - node.level + 1])
                full = base + (node.module.split(".") if node.module else [])
                if len(full) == 1:  # "from . import x"
                    for alias in node.names:
                        yield alias.name
                else:
                    yield full[1]
            elif node.module and node.module.split(".")[0] == "pmap":
                parts = node.module.split(".")
                if len(parts) > 1:
                    yield parts[1]
        elif isinstance(node, ast.Import):
            for alias in node.names:
                parts = alias.name.split(".")
                if parts[0] == "pmap" and len(parts) > 1:
                    yield parts[1]


def _modules():
    return sorted(p for p in PKG.rglob("*.py") if "__pycache__" not in p.parts)


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(PKG)))
def test_no_upward_imports(path):
    top = _top(path)
    if top == "__init__" and path.parent != PKG:
        top = path.parent.name
    level = LAYERS.get(top)
    assert level is not None, f"{top} is not assigned a layer in tests/test_layers.py"
    for name in _imported_pmap_modules(path):
        target = LAYERS.get(name)
        if target is None:
            continue  # an attribute of pmap (e.g. __version__), not a module
        assert target <= level, f"{path.relative_to(PKG)} (layer {level}) imports {name} (layer {target})"


def test_napari_and_qt_only_in_plugin():
    for path in _modules():
        if "napari_plugin" in path.relative_to(PKG).parts[0]:
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
                names = [node.module]
            for n in names:
                assert n.split(".")[0] not in ("napari", "qtpy", "PyQt5", "PySide6", "magicgui"), (
                    f"{path.relative_to(PKG)} imports {n}"
                )


def test_import_pmap_is_light():
    code = (
        "import sys, pmap; "
        "heavy = [m for m in ('napari', 'qtpy', 'PyQt5', 'sklearn', 'matplotlib', 'numba') "
        "if m in sys.modules]; print(heavy)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]", out.stdout
