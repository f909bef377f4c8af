"""A tour of the Python API (gcmc.api), written as notebook cells: run it whole, or paste the
cells one by one into a notebook.

Invented scenario: the Brackenfield Adsorbents pilot plant (an invented company) wants to know
whether its methane-storage carbon "BKF-3" can be characterised with a methane kernel at
298 K. A process engineer explores one state point, builds a small kernel, evaluates it on
the plant rig's pressures, checks it, and compares it with a rebuild under another seed.

    python3 scripts/api_tour.py --quick          # tiny grid, well under a minute on 2 cores
    python3 scripts/api_tour.py                  # a larger grid, some minutes
    python3 scripts/api_tour.py --out DIR        # keep the kernels and the report in DIR
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np

import gcmc

# %% [options]
parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
parser.add_argument("--quick", action="store_true", help="tiny grid and short runs")
parser.add_argument("--out", help="folder for the kernels and the report (default: temporary)")
opts = parser.parse_args()
workdir = Path(opts.out) if opts.out else Path(tempfile.mkdtemp(prefix="gcmc-tour-"))
workdir.mkdir(parents=True, exist_ok=True)
moves = 20_000 if opts.quick else 200_000

# %% [1. One state point] methane at 298.15 K and 35 bar in a 1.0 nm pore (H, nucleus to
# nucleus). The result object has named fields; nothing is printed by the API itself.
run = gcmc.run_point("methane", 298.15, pressure_Pa=3.5e6, width_H_nm=1.0, moves=moves, seed=1)
r = run.result
print(
    f"[point] {run.model.probe.name} in H = {run.model.width_nm:g} nm "
    f"(w = {run.model.internal_width_nm:.3f} nm), p = {run.pressure_Pa:.4g} Pa, "
    f"f = {run.fugacity_Pa:.4g} Pa ({run.eos} EOS)"
)
print(
    f"        density {run.density_per_nm3:.4f} +- {run.density_per_nm3_stderr:.4f} /nm^3, "
    f"excess {run.excess_density_per_nm3:.4f} /nm^3, isosteric heat "
    f"{r.isosteric_heat_kJ_per_mol:.2f} kJ/mol, converged: {run.converged}"
)

# %% [2. The same pore given by its internal width w = H - sigma_ss]
same = gcmc.run_point(
    "methane", 298.15, pressure_Pa=3.5e6, width_w_nm=run.model.internal_width_nm,
    moves=moves, seed=1,
)  # fmt: skip
print(f"[point] by w: {same.density_per_nm3:.4f} /nm^3 (the same pore, the same seed)")

# %% [3. A fugacity the equation of state cannot map to a pressure] the point is still
# simulated; what needs the bulk state is NaN, and a note says why.
dense = gcmc.run_point("argon", 239.6, fugacity_Pa=7e8, bulk=True, moves=20_000, replicas=1)
print(f"[point] dense argon: density {dense.density_per_nm3:.3f} /nm^3, p = {dense.pressure_Pa}")
print(f"        note: {dense.notes[0][:90]}...")

# %% [4. A kernel] a run config (layout: configs/README.md), built with a progress bar.
widths = (
    "[0.70, 0.80, 1.00, 1.40, 2.00]"
    if opts.quick
    else "[0.65, 0.70, 0.75, 0.80, 0.90, 1.00, 1.20, 1.40, 1.70, 2.00]"
)  # noqa: E501
pressures = 5 if opts.quick else 10
eq, prod = (5_000, 20_000) if opts.quick else (40_000, 300_000)


def config_text(name: str, seed: int) -> str:
    return f"""# Brackenfield Adsorbents, carbon BKF-3: methane kernel at 298 K (invented scenario)
seed = {seed}
[kernel]
name = "{name}"
output = "kernels"
[probe]
library_name = "methane"
[widths]
H_nm = {widths}
[temperatures]
K = [298.15]
[pressures]
from_Pa = 1.0e4
to_Pa = 3.5e6
count = {pressures}
[sampling]
equilibration_moves = {eq}
production_moves = {prod}
sample_every = 20
"""


config = workdir / "bkf3-methane.toml"
config.write_text(config_text("bkf3-methane", 7))
built = gcmc.build_kernel(config, workers=1 if opts.quick else 0, progress=True)
print(f"[build] {built.status}: {built.path} in {built.wall_seconds:.1f} s")
forms_used = sorted({f.form for f in built.fits})
print(f"        {built.plan.n_points} points, {len(built.fits)} fits: {forms_used}")

# %% [5. Open it and evaluate the kernel matrix on the rig's pressures]
kernel = gcmc.open_kernel(built.path)
rig_pressures = np.array([2.0e4, 1.0e5, 5.0e5, 1.0e6, 2.5e6])
rig_widths_w = np.array([0.4, 0.6, 1.0, 1.5])
matrix = kernel.evaluate(rig_pressures, rig_widths_w, temperature_K=298.15)
print("[kernel] density /nm^3, rows: pressure (Pa), columns: w (nm)")
print("          " + "".join(f"{w:>10.2f}" for w in rig_widths_w))
for p, row in zip(rig_pressures, matrix, strict=True):
    print(f"  {p:8.3g}" + "".join(f"{v:10.4f}" for v in row))

# %% [6. Check it before use] verdicts with their thresholds; the figures into a folder.
checked = gcmc.check_kernel(
    kernel, realisations=2 if opts.quick else 8, report_dir=workdir / "report"
)
print(f"[check] verdict {checked.verdict} (passed: {checked.passed}); {len(checked.files)} files")
for c in checked.criteria:
    print(f"        {c.verdict:<5} {c.key:<16} {c.measured[:70]}")

# %% [7. Compare with a rebuild under another seed] the same physics, other random numbers:
# for converged points the deviations are of the order of the combined standard errors; the
# --quick runs are too short to converge (the check's point_flags says so), and the diff shows
# it too.
config_b = workdir / "bkf3-methane-seed8.toml"
config_b.write_text(config_text("bkf3-methane-seed8", 8))
built_b = gcmc.build_kernel(config_b, workers=1 if opts.quick else 0)
diff = gcmc.diff_kernels(kernel, built_b.path)
print(
    f"[diff] agree within {diff.max_sigma:g} sigma: {diff.agree}; largest deviation "
    f"{diff.largest_sigma:.2f} sigma; changed fields: {[c[1] for c in diff.changes]}"
)
print(f"[tour] files in {workdir}")
