"""Import rules of the code base (DEVELOPERS.md): imports at the top of modules;
one inside a function says why on its own line or the line above; ``core``
never imports Qt or ``desktop``."""

from __future__ import annotations

import ast
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def unexplained_imports(source: str) -> list[int]:
    """Line numbers of imports inside a function with no comment on their line
    (or, for a multi-line import, its first line) or on the line above."""
    lines = source.splitlines()
    found = set()
    for fn in ast.walk(ast.parse(source)):
        if not isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef)):
            continue
        for node in ast.walk(fn):
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                line = lines[node.lineno - 1]
                above = lines[node.lineno - 2].strip() if node.lineno > 1 else ""
                if "#" not in line and not above.startswith("#"):
                    found.add(node.lineno)
    return sorted(found)


def test_the_check_finds_an_unexplained_import_and_accepts_a_reason():
    src = ("import os\n\n"
           "def f():\n    import json\n    return json\n\n"
           "def g():\n    # imported here: heavy\n    import csv\n    return csv\n\n"
           "def h():\n    import math  # imported here: heavy\n    return math\n")
    assert unexplained_imports(src) == [4]


def test_every_import_inside_a_function_says_why():
    bad = []
    for pkg in ("core", "desktop"):
        for path in sorted((ROOT / pkg).rglob("*.py")):
            for lineno in unexplained_imports(path.read_text(encoding="utf-8")):
                bad.append(f"{path.relative_to(ROOT)}:{lineno}")
    assert not bad, ("imports inside a function without a one-line reason (move them to the top, "
                     "or add '# imported here: ...'): " + ", ".join(bad))


def core_modules() -> list[str]:
    out = []
    for path in sorted((ROOT / "core").rglob("*.py")):
        parts = list(path.relative_to(ROOT).with_suffix("").parts)
        if parts[-1] == "__main__":  # runs the batch command when imported
            continue
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out.append(".".join(parts))
    return out


def test_every_core_module_imports_without_qt_or_desktop():
    mods = core_modules()
    assert "core.analysis" in mods and "core.batch" in mods
    code = ("import importlib, sys\n"
            f"for m in {mods!r}:\n    importlib.import_module(m)\n"
            "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('PySide6', 'pyqtgraph', 'desktop'))\n"
            "print('LOADED', bad)\n")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300,
                         cwd=ROOT, env=env)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip().endswith("LOADED []"), res.stdout + res.stderr
