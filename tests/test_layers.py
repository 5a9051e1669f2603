"""The layers of ``core`` and what each may import (DEVELOPERS.md, "Layers").

Every import of every module under core/ is read with Python's own ``ast``
(top-level and inside functions alike) and checked against the table below,
which is the same table DEVELOPERS.md draws.  A module that reaches up a layer
fails here with the module and the import named.
"""
from __future__ import annotations

import ast
import os

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CORE = os.path.join(ROOT, "core")

# layer -> its modules (a name ending in "/" is a package: all its modules)
LAYERS = {
    "foundation": ["__init__", "errors", "progress", "atomic", "write_guard", "naming", "safe_json",
                   "files", "channel_kinds", "fdr"],
    "events": ["event_file", "fcs", "fcs_text", "fcs_read", "fcs_write", "compensation", "scales",
               "logicle", "transforms", "cleaning", "grids", "prepare", "prepare_file", "export",
               "scenario"],
    "density": ["density/"],
    "science": ["recipe/", "regions", "region_geometry", "region_rules", "region_set", "rare",
                "contrast", "contrast_local", "populations/", "contours", "file_values"],
    "pipeline": ["analysis", "analysis_stages"],
    "front": ["batch/", "session", "tube"],
}
# layer -> the layers it may import from (itself included)
MAY_IMPORT = {
    "foundation": {"foundation"},
    "events": {"foundation", "events"},
    "density": {"foundation", "density"},
    "science": {"foundation", "events", "density", "science"},
    "pipeline": {"foundation", "events", "density", "science", "pipeline"},
    "front": {"foundation", "events", "density", "science", "pipeline", "front"},
}


def _layer_of(module: str) -> str:
    """``module`` is a dotted name below core ("density.model", "fcs")."""
    for layer, members in LAYERS.items():
        for m in members:
            if (m.endswith("/") and (module == m[:-1] or module.startswith(m[:-1] + "."))) or module == m:
                return layer
    raise AssertionError(f"core.{module} belongs to no layer: add it to LAYERS here and to DEVELOPERS.md")


def _modules():
    for folder, _, files in os.walk(CORE):
        for f in sorted(files):
            if f.endswith(".py"):
                rel = os.path.relpath(os.path.join(folder, f), CORE)[:-3].replace(os.sep, ".")
                yield rel[: -len(".__init__")] if rel.endswith(".__init__") else rel, os.path.join(folder, f)


def _core_imports(module: str, path: str, is_package: bool):
    """Dotted names below core that the file imports (relative imports resolved)."""
    here = module.split(".") if is_package else module.split(".")[:-1]
    if module == "__init__":
        here = []
    tree = ast.parse(open(path, encoding="utf-8").read(), path)
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = here[: len(here) - (node.level - 1)] if node.level > 1 else here
                target = base + (node.module.split(".") if node.module else [])
            elif node.module and (node.module == "core" or node.module.startswith("core.")):
                target = node.module.split(".")[1:]
            else:
                continue
            if node.module is None or not target:
                # "from . import x": x is a module (or a name of the package face)
                for alias in node.names:
                    yield ".".join(target + [alias.name]) if target else alias.name
            else:
                yield ".".join(target)
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("core."):
                    yield alias.name[len("core."):]


def _resolve(name: str, known: set) -> str:
    """The longest prefix of ``name`` that is a module we know (a name imported from a package face)."""
    parts = name.split(".")
    while parts:
        cand = ".".join(parts)
        if cand in known:
            return cand
        parts.pop()
    return "__init__"


def test_every_core_module_has_a_layer_and_imports_only_what_its_layer_may():
    modules = dict(_modules())
    known = set(modules)
    wrong = []
    for module, path in modules.items():
        layer = _layer_of(module)
        for name in _core_imports(module, path, path.endswith("__init__.py")):
            target = _resolve(name, known)
            if _layer_of(target) not in MAY_IMPORT[layer]:
                wrong.append(f"core.{module} ({layer}) imports core.{target} ({_layer_of(target)})")
    assert not wrong, "imports that reach up a layer:\n" + "\n".join(wrong)


def test_core_never_imports_qt_or_the_desktop():
    bad = []
    for module, path in _modules():
        tree = ast.parse(open(path, encoding="utf-8").read(), path)
        for node in ast.walk(tree):
            names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""] if isinstance(node, ast.ImportFrom) and not node.level else [])
            bad += [f"core.{module}: {n}" for n in names
                    if n.split(".")[0] in ("PySide6", "PyQt5", "PyQt6", "pyqtgraph", "desktop")]
    assert not bad, bad


@pytest.mark.parametrize("layer", list(LAYERS))
def test_the_table_here_is_the_one_in_the_contributor_guide(layer):
    guide = open(os.path.join(ROOT, "DEVELOPERS.md"), encoding="utf-8").read()
    section = guide.split("## Layers", 1)[1].split("\n## ", 1)[0]
    line = next((ln for ln in section.splitlines() if ln.startswith(f"| {layer} |")), None)
    assert line is not None, f"DEVELOPERS.md's Layers table has no row for {layer}"
    cells = [c.strip() for c in line.strip().strip("|").split("|")]
    listed = {m.strip("` ") for m in cells[1].split(",")}
    may = set() if cells[2] == "nothing else" else {m.strip("` ") for m in cells[2].split(",")}
    assert listed == set(LAYERS[layer])
    assert may == MAY_IMPORT[layer] - {layer}
