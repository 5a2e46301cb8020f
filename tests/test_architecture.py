"""The package's architecture, held against the code.

- The import contracts of ``pyproject.toml`` (``[tool.importlinter]``): the
  layers import downward only (grid, engine, products, file formats, the run,
  then the command line and the web app), and no sibling modules import each
  other in a cycle. Checked with import-linter, a registry package.
- The compiled kernels are private: only their own layer's modules import them.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "sillmark"


def test_the_import_contracts_hold():
    lint = Path(sys.executable).with_name("lint-imports")
    done = subprocess.run([str(lint), "--no-cache", "--no-logo"], cwd=ROOT, capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stdout[-4000:] + done.stderr[-2000:]
    assert "Contracts: " in done.stdout and " broken" in done.stdout


def _imported_modules(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
            names.update(f"{node.module}.{a.name}" for a in node.names)
        elif isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
    return names


def test_kernel_modules_are_imported_only_within_their_own_layer():
    kernels = sorted(PACKAGE.rglob("_*_kernels.py"))
    assert kernels, "no kernel modules found"
    for path in PACKAGE.rglob("*.py"):
        imported = _imported_modules(path)
        for kernel in kernels:
            dotted = ".".join(kernel.relative_to(ROOT).with_suffix("").parts)
            if dotted in imported:
                assert path.parent == kernel.parent, f"{path.relative_to(ROOT)} reaches into {dotted}"
