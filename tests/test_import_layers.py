"""The import layers of the package, checked by import-linter (PyPI ``import-linter``).

The contracts live in ``pyproject.toml`` under ``[tool.importlinter]``: the core imports
nothing of io, session, runs, gui, commands (nor Qt or file libraries); the session, runs and
io import nothing of the window or Qt; the window's modules import each other without cycles.
import-linter counts imports inside functions too, so a lazy import cannot hide a violation.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _lint_imports() -> str:
    exe = Path(sys.executable).with_name("lint-imports")
    if not exe.exists():
        found = shutil.which("lint-imports")
        if found is None:
            pytest.fail("lint-imports is missing: install the test extras (pip install -e '.[test]')")
        exe = Path(found)
    return str(exe)


def test_layer_contracts_are_kept():
    proc = subprocess.run([_lint_imports(), "--no-cache"], cwd=ROOT, capture_output=True, text=True, timeout=120)
    out = proc.stdout + proc.stderr
    # the three contracts of pyproject.toml were read and analysed (not an empty configuration)
    assert "Contracts: 3 kept, 0 broken." in out, out
    assert proc.returncode == 0, out


def test_a_broken_contract_is_reported(tmp_path):
    """The same tool on a two-module package that breaks a forbidden contract exits non-zero."""
    pkg = tmp_path / "toylayers"
    (pkg / "core").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "gui.py").write_text("")
    (pkg / "core" / "__init__.py").write_text("def f():\n    from toylayers import gui  # a lazy import\n")
    (tmp_path / "setup.cfg").write_text(
        "[importlinter]\nroot_package = toylayers\n\n[importlinter:contract:1]\nname = core without gui\n"
        "type = forbidden\nsource_modules = toylayers.core\nforbidden_modules = toylayers.gui\n")
    proc = subprocess.run([_lint_imports(), "--no-cache"], cwd=tmp_path, capture_output=True, text=True,
                          timeout=120, env={"PYTHONPATH": str(tmp_path), "PATH": "/usr/bin:/bin"})
    assert proc.returncode != 0
    assert "BROKEN" in proc.stdout, proc.stdout + proc.stderr
