"""GCMC kernel generator for porous-carbon characterisation.

Importing the package does not import numba: the kernel reader (gcmc.reader) needs only
numpy and h5py.
"""

__version__ = "0.1.0"
