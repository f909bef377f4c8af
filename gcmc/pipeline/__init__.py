"""From a run config to a kernel: config parsing and validation (``config``), the build plan
and its tasks (``tasks``), scheduling over a pool or MPI (``runner``), the a-priori task cost
(``cost``), assembly of finished tasks (``assemble``) and isotherm fits (``fits``).
Uses ``gcmc.sampling``, ``gcmc.kernel`` and ``gcmc.physics``."""
