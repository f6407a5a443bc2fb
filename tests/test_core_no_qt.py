"""The numerical core stays free of Qt and of file I/O.

Importing every module of ``latticeread.core`` in a fresh interpreter must not load
PySide6, shiboken6, pyqtgraph, superqt or any other Qt binding (checked in ``sys.modules``),
and the source of ``latticeread/core`` must not open, load or save files (checked on the
syntax tree with Python's ``ast`` module). Common practice, no source: the same split that
import-linter contracts enforce in layered Python projects.
"""

from __future__ import annotations

import ast
import json
import pkgutil
import subprocess
import sys
from pathlib import Path

import latticeread.core

CORE_DIR = Path(latticeread.core.__file__).parent
QT_PREFIXES = ("PySide6", "PySide2", "PyQt5", "PyQt6", "shiboken6", "shiboken2", "pyqtgraph", "superqt", "qtpy")

#: Modules whose import means file access; calls that read or write files.
FILE_MODULES = {"tifffile", "h5py", "imageio", "PIL", "pandas", "shutil", "tempfile", "pickle", "csv", "sqlite3"}
FILE_CALLS = {"open", "load", "save", "savez", "savez_compressed", "savetxt", "loadtxt", "genfromtxt", "fromfile",
              "tofile", "memmap", "read_text", "write_text", "read_bytes", "write_bytes", "imread", "imwrite",
              "imsave", "mkdir", "unlink", "remove", "rename", "replace_file", "makedirs"}


def core_module_names() -> list[str]:
    return sorted(f"latticeread.core.{m.name}" for m in pkgutil.iter_modules([str(CORE_DIR)]))


def test_core_imports_no_qt():
    names = core_module_names()
    assert "latticeread.core.geometry" in names  # the walk found the package
    code = (
        "import importlib, json, sys\n"
        f"for name in {names!r}:\n"
        "    importlib.import_module(name)\n"
        "print(json.dumps(sorted(sys.modules)))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         env={"QT_QPA_PLATFORM": "offscreen", "PATH": "/usr/bin:/bin"})
    assert out.returncode == 0, out.stderr
    loaded = json.loads(out.stdout.strip().splitlines()[-1])
    qt = [m for m in loaded if m.split(".")[0] in QT_PREFIXES]
    assert qt == [], f"latticeread.core pulled in Qt modules: {qt[:10]}"
    assert "latticeread.io" not in loaded and "latticeread.gui" not in loaded


def _file_access(tree: ast.AST) -> list[str]:
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [f"import {a.name}" for a in node.names if a.name.split(".")[0] in FILE_MODULES]
        elif isinstance(node, ast.ImportFrom) and node.module:
            root = node.module.split(".")[0]
            if root in FILE_MODULES or node.module.startswith("latticeread.io") or root in QT_PREFIXES:
                found.append(f"from {node.module} import ...")
        elif isinstance(node, ast.Call):
            func = node.func
            name = func.id if isinstance(func, ast.Name) else func.attr if isinstance(func, ast.Attribute) else ""
            if name in FILE_CALLS:
                found.append(f"call {name}() at line {node.lineno}")
    return found


def test_core_source_does_no_file_io():
    offenders = {}
    files = sorted(CORE_DIR.rglob("*.py"))
    assert files
    for path in files:
        hits = _file_access(ast.parse(path.read_text(encoding="utf-8"), filename=str(path)))
        if hits:
            offenders[path.name] = hits
    assert offenders == {}, f"file I/O inside latticeread/core: {offenders}"


def test_checker_catches_file_access():
    """The syntax-tree check itself must be able to fail."""
    bad = ast.parse("import numpy as np\nimport h5py\nx = np.load('a.npy')\nopen('b').read()\n")
    assert len(_file_access(bad)) == 3
    assert _file_access(ast.parse("import numpy as np\ny = np.sum([1, 2])\n")) == []
