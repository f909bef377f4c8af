"""The simulation: the compiled engine (``engine``, ``rng``), the simulation box that owns the
engine's arrays (``box``), one state point with its replicas (``point``), the pressure and
temperature ladders (``ladder``) and the statistics that judge convergence (``statistics``).
Uses ``gcmc.physics`` only."""
