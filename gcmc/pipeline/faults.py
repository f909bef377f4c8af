"""A test seam: make chosen build tasks fail on purpose.

``GCMC_FAIL_TASK=t000_w002[,t001_w000...]`` in the environment makes those tasks raise
before they simulate, so that the tests exercise failure records, the build's report of
them and the retry on a rerun (tests/test_build_resume.py, tests/test_build_mpi.py). Unset in
real builds, where :func:`check_task` does nothing.
"""

from __future__ import annotations

import os

#: The environment variable naming the task keys to fail (comma-separated).
FAIL_TASK_ENV = "GCMC_FAIL_TASK"


def failing_tasks() -> list[str]:
    """The task keys the environment asks to fail (empty in a real build)."""
    return [k for k in os.environ.get(FAIL_TASK_ENV, "").split(",") if k]


def check_task(key: str) -> None:
    """Raise RuntimeError if the task ``key`` is one the environment asks to fail."""
    if key in failing_tasks():
        value = os.environ.get(FAIL_TASK_ENV, "")
        raise RuntimeError(f"failed on purpose (test hook {FAIL_TASK_ENV}={value})")
