"""The kernel file format: the in-memory kernel (``data``), the HDF5 writer (``writer``) and
reader (``reader``) and the correlating forms (``forms``). Imports nothing beyond numpy, h5py
and the package's error type, so that a downstream inversion code reads kernels without numba
or scipy."""
