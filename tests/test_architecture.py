"""The science package must stay Qt-free (house style; import-linter contract in pyproject)."""

import ast
import pathlib
import shutil
import subprocess
import sys

ROOT = pathlib.Path(__file__).resolve().parents[1]


def test_fitting_never_imports_qt_or_app():
    bad = []
    for path in (ROOT / "fitting").rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                names = [node.module or ""]
            for n in names:
                if n.split(".")[0] in {"PySide6", "PyQt5", "PyQt6", "app"} or \
                        n == "matplotlib.pyplot":
                    bad.append(f"{path.relative_to(ROOT)}: {n}")
    assert not bad, bad


def test_import_linter_contract():
    # import-linter is a test dependency; its command sits beside this Python (a venv's
    # bin/ need not be on PATH when the tests are run as /path/to/venv/bin/python -m pytest).
    exe = pathlib.Path(sys.executable).with_name("lint-imports")
    exe = str(exe) if exe.exists() else shutil.which("lint-imports")
    assert exe, "lint-imports not found: install the test extras, pip install -e '.[test]'"
    out = subprocess.run([exe, "--no-cache"], cwd=ROOT, capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr


def test_fitting_imports_without_qt():
    code = ("import sys, fitting.stack, fitting.dispersion, fitting.optics; "
            "assert 'PySide6' not in sys.modules")
    subprocess.run([sys.executable, "-c", code], check=True, cwd=ROOT)
