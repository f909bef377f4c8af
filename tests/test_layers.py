"""The layer rule of the package (DEVELOPERS.md, "The architecture in a page").

Each layer imports only the layers below it (cli -> api -> pipeline -> {quality, sampling} ->
{physics, kernel} -> {errors, files}: the build calls the quality criteria to refine its
kernel; the command line may use the Python API, nothing below uses either), and the kernel
file format imports nothing beyond numpy and h5py.
The static contracts live in pyproject.toml ([tool.importlinter]); the runtime test below
also catches an import hidden inside a function that the static graph sees too, and a
third-party package pulled in by a dependency.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


def test_import_contracts_hold() -> None:
    """Every [tool.importlinter] contract is kept (fails on an upward import or a circle)."""
    cli = pytest.importorskip("importlinter.cli")
    status = cli.lint_imports(config_filename=str(REPO / "pyproject.toml"), no_cache=True)
    assert status == 0, "an import contract is broken: run `lint-imports` for the chain"


def test_reader_loads_without_numba_or_scipy() -> None:
    """Importing and using the reader's module loads neither numba nor scipy (fresh process)."""
    code = (
        "import sys, json\n"
        "import gcmc.reader, gcmc.kernel.reader, gcmc.kernel.writer, gcmc.kernel.forms\n"
        "print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in "
        "('numba', 'scipy', 'matplotlib', 'CoolProp', 'teqp', 'mpi4py', 'tqdm'))))\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=REPO
    )
    assert json.loads(out.stdout) == []


def test_layer_folders_hold_every_module() -> None:
    """No module sits beside the layers except the shared error type and atomic file writes
    (the bottom layer), the package marker and the documented `gcmc.reader` and `gcmc.api`
    entry points."""
    allowed = {"__init__.py", "errors.py", "files.py", "reader.py", "api.py"}
    loose = sorted(p.name for p in (REPO / "gcmc").glob("*.py") if p.name not in allowed)
    assert loose == []


def test_the_api_sits_above_the_layers_it_uses() -> None:
    """gcmc.api is a layer of the contract, directly under gcmc.cli: nothing below imports
    it (an upward import breaks the layers contract above), and it is not a loose module."""
    import tomllib

    cfg = tomllib.loads((REPO / "pyproject.toml").read_text())
    layers = cfg["tool"]["importlinter"]["contracts"][0]["layers"]
    assert layers[:3] == ["gcmc.cli", "gcmc.api", "gcmc.pipeline"]
