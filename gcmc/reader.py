"""Kernel reader, kept at its documented place: ``from gcmc.reader import open_kernel``.

The reader lives in :mod:`gcmc.kernel.reader`; this module re-exports it unchanged. It needs
numpy and h5py only.
"""

from gcmc.kernel.reader import *  # noqa: F403
from gcmc.kernel.reader import __all__  # noqa: F401
