"""The model: probes and solids (``model``), pair and wall potentials (``potentials``),
bulk equations of state (``eos``), exact low-pressure limits (``henry``) and the unit
conversions at the project's boundary (``units``). Imports nothing above itself."""
