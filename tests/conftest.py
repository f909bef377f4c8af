"""Shared fixtures and options for the test suite.

- ``--run-slow``: also run the tests marked ``@pytest.mark.slow`` (longer, tighter physics
  validations). pyproject's addopts deselect them with ``-m 'not slow'``; ``-m slow`` on the
  command line overrides that marker expression and runs only the slow ones.
- ``engine``: a session fixture that loads (or compiles) the numba engine once, so that the
  first test that simulates does not pay the compilation and its timing is the physics only.
"""

from __future__ import annotations

import pytest


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption(
        "--run-slow",
        action="store_true",
        default=False,
        help="also run tests marked slow (longer, tighter physics validations)",
    )


def pytest_configure(config: pytest.Config) -> None:
    # --run-slow widens the default marker expression "not slow" (from pyproject addopts) to
    # everything. An explicit -m given by the user (e.g. -m slow, -m mpi) is left alone.
    if config.getoption("--run-slow") and config.option.markexpr.strip() in (
        "not slow",
        "'not slow'",
        '"not slow"',
    ):
        config.option.markexpr = ""


@pytest.fixture(scope="session")
def engine() -> float:
    """Load (or compile) the compiled engine once per session; returns the seconds it took."""
    from gcmc.sampling.box import warm_up

    return warm_up()


@pytest.fixture(scope="session")
def tiny_kernel(tmp_path_factory: pytest.TempPathFactory, engine: float):
    """The tiny methane kernel of tests/configs/tiny.toml, built once per session through the
    Python API in one process (a few seconds); returns the BuildResult."""
    import shutil
    from pathlib import Path

    from gcmc.api import build_kernel

    folder = tmp_path_factory.mktemp("tiny")
    config = folder / "tiny.toml"
    shutil.copy(Path(__file__).parent / "configs" / "tiny.toml", config)
    result = build_kernel(config, workers=1)
    assert result.status == "written", result.status
    return result
