"""GCMC kernel generator for porous-carbon characterisation.

Importing the package does not import numba: the kernel reader (gcmc.reader) needs only
numpy and h5py. The Python API (:mod:`gcmc.api`) is importable from here too, loaded on first
use: ``gcmc.run_point``, ``gcmc.build_kernel``, ``gcmc.open_kernel``, ``gcmc.check_kernel``,
``gcmc.diff_kernels``.
"""

from __future__ import annotations

from typing import Any

__version__ = "0.1.0"

_API_NAMES = (
    "run_point",
    "build_kernel",
    "open_kernel",
    "check_kernel",
    "diff_kernels",
    "PointRun",
    "CheckResult",
    "DiffResult",
)

__all__ = ["__version__", *_API_NAMES]


def __getattr__(name: str) -> Any:
    """Load :mod:`gcmc.api` on first use of one of its names (PEP 562)."""
    if name in _API_NAMES:
        import importlib

        return getattr(importlib.import_module("gcmc.api"), name)
    raise AttributeError(f"module 'gcmc' has no attribute {name!r}")
