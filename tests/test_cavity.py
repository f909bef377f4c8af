"""Cavity-biased grand canonical exchange on a counted grid (Mezei, Mol. Phys. 40 (1980) 901;
gcmc.sampling.cavity) against exact limits and the engine's ordinary GCMC.

Each check names its reference beside it:

- the ideal gas (exact limit): N is Poisson with mean z V whatever the cavities, because the
  acceptance rules carry the exact cavity volume (a rule with V instead of V_cav, or a
  deletion that ignores "the molecule's cell must be a cavity without it", is off by many
  standard errors: checked by breaking each once, see the test's docstring);
- bookkeeping (exact): the incremental occupancy, cavity count and cavity list equal a
  brute-force recount, and the running energy a full recomputation;
- the dense LJ fluid: the same <N> as plain-insertion GCMC (gcmc.sampling.engine, Norman &
  Filinov 1969) at the activity that the Thol et al., J. Phys. Chem. Ref. Data 45 (2016)
  023101 equation of state (teqp) gives for rho* = 0.6 at T* = 1.5.

Fixed seeds; tolerances are k standard errors from the runs' own block errors (Flyvbjerg &
Petersen 1989, gcmc.sampling.statistics.block_average), stated beside each check.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from gcmc.errors import InputError
from gcmc.physics.model import BULK, PoreModel, Probe, Solid
from gcmc.physics.potentials import slit_pore
from gcmc.sampling.box import Box, EngineOptions
from gcmc.sampling.cavity import CavityOptions, CavitySampler, sample_cavity
from gcmc.sampling.rng import seed_state
from gcmc.sampling.statistics import block_average

#: Argon-like numbers for reduced-unit states (invented for the tests).
EPS_K, SIG_NM = 120.0, 0.34
LJ = Probe(name="lj-reduced", epsilon_k=EPS_K, sigma_nm=SIG_NM)
IDEAL = Probe(name="ideal", epsilon_k=1e-9, sigma_nm=SIG_NM)


def brute_force_grid(s: CavitySampler) -> tuple[np.ndarray, np.ndarray]:
    """(occ, cavity mask) recounted from the positions with numpy: molecule centres within
    R_c (minimum image in the periodic directions) of each grid cell's centre."""
    nx, ny, nz = s.grid_counts
    g = s.gp[:3]
    lx, ly, lz = s.box.model.box_lengths_nm
    iz, iy, ix = np.meshgrid(np.arange(nz), np.arange(ny), np.arange(nx), indexing="ij")
    centres = np.stack([(ix.ravel() + 0.5) * g[0], (iy.ravel() + 0.5) * g[1],
                        (iz.ravel() + 0.5) * g[2]], axis=1)  # fmt: skip
    pos = s.box.positions()
    occ = np.zeros(len(centres), dtype=np.int64)
    periodic_z = s.box.model.geometry == BULK
    for p in pos:
        d = centres - p
        d[:, 0] -= lx * np.round(d[:, 0] / lx)
        d[:, 1] -= ly * np.round(d[:, 1] / ly)
        if periodic_z:
            d[:, 2] -= lz * np.round(d[:, 2] / lz)
        occ += (np.einsum("ij,ij->i", d, d) < s.gp[6]).astype(np.int64)
    return occ, (occ == 0) & (s.allowed != 0)


# =============================================================================================
# 1. Ideal gas (exact limit)
# =============================================================================================


def test_ideal_gas_poisson_with_cavities() -> None:
    """Exact limit: without interactions N is Poisson with mean z V (var N = <N>), whatever
    the cavity volume the moves see. Here z V = 30 molecules in a periodic cube of 2.04 nm
    with R_c = 0.8 sigma: the cavities fill only ~ 75 % of V, so the rules' exact V_cav
    matters. Checked by breaking the code once each way (not kept; 10^6 moves each): V
    instead of V_cav in both rules gave <N> = 49.1, ignoring the cavity rule of the deletion
    <N> = 23.5, both over 40 standard errors (about 0.14 here) away. 4 block-averaged
    standard errors."""
    model = PoreModel(probe=IDEAL, solid=Solid(), geometry=BULK, cutoff_nm=1.02, box_nm=2.04)
    zv = 30.0
    opts = CavityOptions(grid_sigma=0.2, cavity_radius_sigma=0.8)
    s = CavitySampler(
        model, 300.0, zv / model.volume_nm3, opts, EngineOptions(displacement_fraction=0.2),
        rng_state=seed_state(7),
    )  # fmt: skip
    s.run(20_000)
    ns = 50_000
    n = np.zeros(ns, dtype=np.int64)
    s.reset_counters()
    s.run(ns * 20, 20, n, np.zeros(ns), np.zeros(ns))
    assert s.exchanges > 100_000
    assert s.xcounters[1] > 10_000  # the deletion's cavity rule was exercised
    frac = s.cavity_volume_nm3 / model.volume_nm3
    assert 0.5 < frac < 0.95, frac  # the cavities are not the whole volume
    est = block_average(n.astype(float))
    assert est.reliable
    assert abs(est.mean - zv) < 4.0 * est.stderr, (est.mean, est.stderr)
    # var N = <N> (Poisson, exact): relative error of a variance of n_eff samples of a
    # Poisson variable sqrt((2 + 1/<N>) / n_eff); 4 of them
    rel = math.sqrt((2.0 + 1.0 / zv) / est.n_effective)
    assert abs(n.var() / zv - 1.0) < 4.0 * rel, (n.var(), rel)


# =============================================================================================
# 2. Bookkeeping (exact)
# =============================================================================================


def test_bookkeeping_slit_with_walls_and_slab_tail() -> None:
    """Exact: after many insertions, deletions and displacements in a slit (Steele walls,
    slab tail), occ, n_cav and the cavity list equal a brute-force recount, every listed
    cell knows its place in the list, and the running energy equals a full recomputation."""
    model = slit_pore(LJ, 3.0 * SIG_NM, 10.0 * SIG_NM)
    s = CavitySampler(model, 1.2 * EPS_K, 8.0, CavityOptions(0.25, 0.8), rng_state=seed_state(5))
    s.run(300_000)
    assert s.box.counters[3] > 200 and s.box.counters[5] > 100  # insertions, deletions
    assert s.n_molecules > 50
    occ, cav = brute_force_grid(s)
    assert np.array_equal(occ, s.occ)
    m = s.n_cavities
    assert m == int(cav.sum()) and m > 0
    listed = s.cav_list[:m]
    assert set(listed.tolist()) == set(np.nonzero(cav)[0].tolist())
    assert np.array_equal(s.cav_pos[listed], np.arange(m))
    assert np.all(s.cav_pos[~cav] == -1)
    # cells next to the walls are excluded (beta V_wall > 40 there)
    assert s.allowed.min() == 0 and s.allowed.max() == 1
    uff, usf = s.box.recomputed_energy()
    assert abs(s.box.energy[0] - uff) < 1e-7 * max(1.0, abs(uff))
    assert abs(s.box.energy[1] - usf) < 1e-7 * max(1.0, abs(usf))


# =============================================================================================
# 3. Dense LJ: the same <N> as plain-insertion GCMC
# =============================================================================================


def _thol_activity(t_star: float, rho_star: float) -> float:
    """z* = rho* exp(beta mu_ex) from Thol et al. (2016) via teqp."""
    import teqp

    m = teqp.make_model({"kind": "LJ126_TholJPCRD2016", "model": {}})
    a0, a1 = m.get_Ar01n(t_star, rho_star, np.array([1.0]))
    return rho_star * math.exp(a0 + a1)


def _dense(engine_moves: int, cavity_moves: int, box_sigma: float, rc_sigma: float) -> None:
    t_star, rho_star = 1.5, 0.6
    length = box_sigma * SIG_NM
    model = PoreModel(probe=LJ, solid=Solid(), geometry=BULK, cutoff_nm=rc_sigma * SIG_NM,
                      box_nm=length)  # fmt: skip
    z = _thol_activity(t_star, rho_star) / SIG_NM**3
    t = t_star * EPS_K
    n0 = int(rho_star * box_sigma**3)
    m = int(math.ceil(n0 ** (1 / 3)))
    g = (np.arange(m) + 0.5) / m * length
    sites = np.array([(a, b, c) for a in g for b in g for c in g])[:n0]
    every = 50
    # the engine, plain insertion (a move costs about a tenth of a cavity-biased one here)
    ns = engine_moves // every
    box = Box(model, t, z, rng_state=seed_state(21), max_displacement_nm=0.15 * SIG_NM)
    box.load_positions(sites)
    box.run(200_000)
    n = np.zeros(ns, dtype=np.int64)
    box.run(ns * every, every, n, np.zeros(ns), np.zeros(ns), 0, np.zeros(box.n_bins))
    e_ref = block_average(n.astype(float))
    # cavity-biased
    r = sample_cavity(model, t, z, cavity_moves, every, 22, 200_000, start=sites,
                      options=CavityOptions(0.25, 0.8))  # fmt: skip
    e = block_average(r.n.astype(float))
    assert e.reliable and e_ref.reliable
    assert r.exchanges > 20_000
    # the two samplers agree within 4 combined standard errors
    comb = math.hypot(e.stderr, e_ref.stderr)
    assert abs(e.mean - e_ref.mean) < 4.0 * comb, (e.mean, e_ref.mean, comb)
    # and both are near the EOS density (a loose sanity bound: the cutoff and the box differ
    # from the EOS's infinite system; 3 % of N)
    assert abs(e.mean / (rho_star * box_sigma**3) - 1.0) < 0.03


def test_dense_lj_matches_plain_insertion() -> None:
    """Bulk LJ at T* = 1.5 and the Thol et al. (2016, teqp) activity of rho* = 0.6, 5 sigma
    box (75 molecules), r_c = 2.5 sigma with the homogeneous tail: cavity-biased and plain
    insertion GCMC give the same <N> (4 combined block errors, about 0.15 molecule)."""
    _dense(16_000_000, 2_000_000, 5.0, 2.5)


@pytest.mark.slow
def test_dense_lj_matches_plain_insertion_long() -> None:
    """As above in a 6 sigma box (130 molecules) with r_c = 3 sigma, 5x the moves."""
    _dense(80_000_000, 10_000_000, 6.0, 3.0)


# =============================================================================================
# 4. Bad input
# =============================================================================================


def test_bad_options_name_the_field() -> None:
    """Bad input: a one-line error naming the field."""
    model = PoreModel(probe=LJ, solid=Solid(), geometry=BULK, cutoff_nm=1.02, box_nm=2.04)
    with pytest.raises(InputError, match="grid_sigma"):
        CavitySampler(model, 240.0, 1.0, CavityOptions(grid_sigma=0.0))
    with pytest.raises(InputError, match="cavity_radius_sigma"):
        CavitySampler(model, 240.0, 1.0, CavityOptions(cavity_radius_sigma=0.1))
    with pytest.raises(InputError, match="cavity_radius_sigma"):
        CavitySampler(model, 240.0, 1.0, CavityOptions(cavity_radius_sigma=3.0))
