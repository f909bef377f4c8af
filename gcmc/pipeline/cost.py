"""A-priori cost of a build task (one temperature x one width: a pressure ladder), for the
scheduler's most-expensive-first order on a first build, before any task has been measured.

What a task costs is the sum over its points of (moves x CPU per move), and CPU per move is
dominated by two things (benchmarks/README.md, "Scale-out": per-point costs of a methane and
an argon kernel):

- **biased insertion**: once plain insertion is accepted less than ``bias_threshold`` per
  attempt (a filled pore), each insertion and deletion evaluates ``biased_trials`` trial
  positions, about 10x the cost per move; which points of a ladder switch decides which tasks
  are dear (narrow, strongly adsorbing pores fill at low pressure and run biased for most of
  the ladder; wide pores at a supercritical temperature never do);
- **neighbours**: each energy evaluation sums over the molecules in the cells within r_c,
  about rho x (3 r_c)^2 x min(w, 3 r_c).

The loading that decides both is estimated without simulation by a Langmuir form whose
low-pressure slope is the pore's exact Henry constant (gcmc.physics.henry) and whose capacity is a
liquid-like packing, rho sigma^3 = 0.8 (common practice for a dense LJ liquid near its triple
point). On the measured methane kernel at 298 K this estimate follows the simulated densities
to a few hundredths of rho sigma^3 and predicts which points run biased; the switch is taken
at an estimated rho sigma^3 of 0.5, or where a Langmuir estimate of one wall's coverage (the
Henry slope per area, a close-packed monolayer as capacity) exceeds 0.3: at 87 K the films
of wide pores run biased long before the pores fill. Only the order of tasks depends on this
model, never a result: a wrong estimate costs wall time, not correctness, and a resumed
build rescales it by measured costs (gcmc.pipeline.tasks.learned_order).
"""

from __future__ import annotations

import math

import numpy as np

from gcmc.physics.henry import pore_limit
from gcmc.physics.model import SLIT, PoreModel
from gcmc.sampling.box import ZBIN_SIGMA

#: Capacity of the Langmuir loading estimate, rho sigma^3 (a dense LJ liquid; common practice).
CAPACITY_RHO_SIGMA3 = 0.8
#: Estimated rho sigma^3 above which the sampler is expected to switch to biased insertion
#: (measured switch points: 0.42-0.57 on the methane kernel; see the module docstring).
BIAS_RHO_SIGMA3 = 0.5
#: Estimated coverage of a wall above which a film is expected to run biased insertion
#: (calibrated on the two replay kernels of benchmarks/schedule_replay.py: at 0.3 the rank
#: correlation of estimate and measured task cost is +0.88 for methane at 298 K and +0.84 for
#: argon at 87 K; at 0.5 and above the argon films are missed, +0.69).
BIAS_COVERAGE = 0.3
#: Neighbours per energy evaluation that cost as much as the rest of a move (overhead: random
#: numbers, wall energy, slab tail; from the plain-insertion points of the methane kernel,
#: 0.03-0.1 us per move empty, about 0.2 us at rho sigma^3 = 0.5 with ~90 neighbours).
NEIGHBOURS_PER_OVERHEAD = 30.0
#: z bins of the slab-tail sum that cost as much as the rest of a move (empty pores of the
#: methane kernel: 0.03 us per move at H = 0.7 nm, 0.05 us at 2 nm, 100-270 bins).
BINS_PER_OVERHEAD = 250.0


def _langmuir_fraction(slope: float, fugacity_pa: np.ndarray, capacity: float) -> np.ndarray:
    """theta = K f / (c + K f): a Langmuir form with slope K at zero fugacity and capacity c."""
    kf = slope * np.asarray(fugacity_pa, dtype=float)
    return kf / (capacity + kf)


def estimated_loading_per_nm3(
    henry_per_nm3_per_pa: float, fugacity_pa: np.ndarray, sigma_nm: float
) -> np.ndarray:
    """Langmuir estimate of the density per pore volume: the exact Henry slope at low
    fugacity, a liquid-like capacity at high fugacity."""
    cap = CAPACITY_RHO_SIGMA3 / sigma_nm**3
    return cap * _langmuir_fraction(henry_per_nm3_per_pa, fugacity_pa, cap)


def estimated_coverage(
    henry_per_nm2_per_pa: float, fugacity_pa: np.ndarray, sigma_nm: float
) -> np.ndarray:
    """Langmuir estimate of the fractional coverage of one wall: the exact Henry slope per
    wall area, a close-packed monolayer (2 / (sqrt 3 sigma^2) molecules per nm^2) as capacity."""
    cap = 2.0 / (math.sqrt(3.0) * sigma_nm**2)
    return _langmuir_fraction(henry_per_nm2_per_pa, fugacity_pa, cap)


def estimate_task_cost(
    model: PoreModel,
    temperature_k: float,
    fugacities_pa: np.ndarray,
    moves_per_point: float,
    insertion_trials: int,
    biased_trials: int,
    displacement_fraction: float,
    branches: int = 1,
    replicas: int = 1,
) -> float:
    """Relative CPU cost of one task (arbitrary units, comparable between tasks of a build).

    ``insertion_trials`` as in SamplingSettings: 0 = automatic (plain, switched to
    ``biased_trials`` in filled pores), k >= 1 = always k.
    """
    limit = pore_limit(model, temperature_k)
    if limit.blocked:
        return 0.0
    sig = model.probe.sigma_nm
    rho = estimated_loading_per_nm3(limit.henry_per_nm3_per_pa, fugacities_pa, sig)
    span = 3.0 * model.cutoff_nm
    w = max(model.internal_width_nm, sig)
    neighbours = rho * span * span * min(w, span)
    # the slab tail sums over the z bins of the whole pore at every energy evaluation
    bins = model.width_nm / (ZBIN_SIGMA * sig) if model.geometry == SLIT else 0.0
    per_eval = 1.0 + neighbours / NEIGHBOURS_PER_OVERHEAD + bins / BINS_PER_OVERHEAD
    if insertion_trials == 0:
        # biased where the pore fills, or where the film on a wall is dense already (at a
        # subcritical temperature the films of wide pores switch long before they fill)
        # K_H is per pore volume A w: K_H w per area of the pore, half of it per wall
        per_wall = limit.henry_per_nm3_per_pa * model.internal_width_nm / 2.0
        film = estimated_coverage(per_wall, fugacities_pa, sig)
        filled = (rho * sig**3 > BIAS_RHO_SIGMA3) | (film > BIAS_COVERAGE)
        k = np.where(filled, max(1, biased_trials), 1)
    else:
        k = np.full(rho.shape, max(1, insertion_trials))
    # displacements evaluate the energy twice (old and new position); insertions and
    # deletions once per trial position
    per_move = per_eval * (2.0 * displacement_fraction + (1.0 - displacement_fraction) * k)
    total = float(np.sum(per_move)) * moves_per_point * branches * replicas
    return total if math.isfinite(total) else 0.0
