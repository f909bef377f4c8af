"""Bookkeeping of the compiled engine: the running energy against full recomputations, the cell
and z-bin structures against the positions, and single-configuration energies against the
formulas of the model written out independently here.

References beside each check:
- exact bookkeeping identity: the energy accumulated move by move equals the energy of the final
  configuration computed from scratch (an identity of the algorithm; 1e-9 relative allows for
  the rounding of ~1e5 accumulated floating-point increments, each exact to ~1e-16 relative);
- Lennard-Jones 12-6 pair energy (Jones, Proc. R. Soc. Lond. A 106 (1924) 463, the usual form);
- Steele 10-4-3 wall (Steele, Surf. Sci. 36 (1973) 317), one term per wall;
- homogeneous long-range correction U_tail = (N^2/2V) int_rc^inf 4 pi r^2 u(r) dr
  (Allen & Tildesley, Computer Simulation of Liquids), evaluated here by quadrature;
- slab tail correction: the pair tail between laterally smeared molecules,
  (1/A) 2 pi int_max(|dz|, rc)^inf r u(r) dr (Janecek, J. Phys. Chem. B 110 (2006) 6264),
  evaluated here by quadrature.
"""

from __future__ import annotations

import json
import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import integrate

from gcmc.kernel import flags as fl
from gcmc.physics.model import BULK, SLIT, PoreModel, Probe, Solid, default_solid, get_probe
from gcmc.physics.potentials import homogeneous_tail_constant, steele_prefactor_k
from gcmc.physics.units import activity_per_nm3
from gcmc.sampling import engine as E
from gcmc.sampling.box import Box, EngineOptions
from gcmc.sampling.point import SamplingSettings, ThermoState, simulate_point
from gcmc.sampling.rng import seed_state

pytestmark = pytest.mark.usefixtures("engine")

#: Relative agreement demanded between the running energy and a recomputation (see docstring).
REL_TOL = 1e-9


# --- independent reference implementation (numpy, from the positions only) ------------------


def reference_energy(box: Box) -> tuple[float, float]:
    """(U_ff, U_sf) of the box's configuration, written from the model's formulas.

    Fluid-fluid: LJ 12-6 truncated at r_c, minimum image in x, y (and z in bulk); plus the
    homogeneous tail N^2 c / V in bulk, or, in a slit with the slab tail on, the pair tail
    phi(max(|b_i - b_j| dz, r_c)) / A between the z bins b of the engine's profile.
    Solid-fluid: the Steele 10-4-3 potential of both walls.
    """
    model = box.model
    eps, sig, rc = model.probe.epsilon_k, model.probe.sigma_nm, model.cutoff_nm
    lx, ly, lz = model.box_lengths_nm
    x = box.positions()
    n = len(x)
    slit = model.geometry == SLIT
    d = x[:, None, :] - x[None, :, :]
    d[..., 0] -= lx * np.round(d[..., 0] / lx)
    d[..., 1] -= ly * np.round(d[..., 1] / ly)
    if not slit:
        d[..., 2] -= lz * np.round(d[..., 2] / lz)
    r2 = np.sum(d * d, axis=-1)
    iu = np.triu_indices(n, 1)
    r2 = r2[iu]
    s6 = (sig * sig / r2) ** 3
    uff = float(np.sum(np.where(r2 < rc * rc, 4.0 * eps * (s6 * s6 - s6), 0.0)))
    usf = 0.0
    if not slit:
        # Allen & Tildesley: U_tail/N = (8/3) pi rho eps sigma^3 [(1/3)(sigma/rc)^9 - (sigma/rc)^3]
        sr3 = (sig / rc) ** 3
        c = (8.0 / 3.0) * math.pi * eps * sig**3 * (sr3**3 / 3.0 - sr3)
        uff += n * n * c / (lx * ly * lz)
    else:
        sf = model.solid_fluid
        pre = 2.0 * math.pi * model.solid.density_nm3 * sf.epsilon_k * sf.sigma_nm**2
        delta = model.solid.interlayer_nm
        pre *= delta

        def steele(zz: np.ndarray) -> np.ndarray:
            return pre * (
                0.4 * (sf.sigma_nm / zz) ** 10
                - (sf.sigma_nm / zz) ** 4
                - sf.sigma_nm**4 / (3.0 * delta * (zz + 0.61 * delta) ** 3)
            )

        usf = float(np.sum(steele(x[:, 2]) + steele(lz - x[:, 2])))
        if box.options.slab_tail:
            nb = box.n_bins
            dz = lz / nb
            b = np.clip((x[:, 2] * (nb / lz)).astype(np.int64), 0, nb - 1)
            a = np.maximum(np.abs(b[:, None] - b[None, :])[iu] * dz, rc)
            phi = 8.0 * math.pi * eps * (sig**12 / (10.0 * a**10) - sig**6 / (4.0 * a**4))
            uff += float(np.sum(phi)) / (lx * ly)
    return uff, usf


def assert_structures_consistent(box: Box) -> None:
    """Every molecule sits in the cell and z bin its coordinates say; the index maps agree."""
    n = box.n_molecules
    assert int(box.cell_n.sum()) == n
    assert int(box.zbin_n.sum()) == n
    lx, ly, lz = box.model.box_lengths_nm
    pos = box.positions()
    assert np.all((pos[:, 0] >= 0) & (pos[:, 0] < lx) & (pos[:, 1] >= 0) & (pos[:, 1] < ly))
    if box.model.geometry == SLIT:
        assert np.all((pos[:, 2] > 0) & (pos[:, 2] < lz))
    else:
        assert np.all((pos[:, 2] >= 0) & (pos[:, 2] < lz))
    for i in range(n):
        c, s = box.pid_cell[i], box.pid_slot[i]
        assert s < box.cell_n[c]
        assert box.cell_pid[c, s] == i
        assert E.cell_of(pos[i, 0], pos[i, 1], pos[i, 2], box.fp, box.ip) == c
    nb = box.n_bins
    bins = np.clip((pos[:, 2] * box.fp[E.F_INV_DZ]).astype(np.int64), 0, nb - 1)
    np.testing.assert_array_equal(np.bincount(bins, minlength=nb), box.zbin_n)


def rel_diff(a: float, b: float) -> float:
    return abs(a - b) / max(abs(b), 1e-300)


# --- systems -----------------------------------------------------------------------------


def bulk_lj_box(k: int, seed: int) -> Box:
    """A dense supercritical LJ fluid (T* = 1.5, z chosen for rho* ~ 0.7), cube of 6 sigma."""
    probe = Probe(name="lj", epsilon_k=120.0, sigma_nm=0.34)
    model = PoreModel(
        probe=probe, solid=Solid(), geometry=BULK, cutoff_nm=3.0 * 0.34, box_nm=6.0 * 0.34
    )
    # f* = f sigma^3 / eps = 0.7 gives rho* ~ 0.70 at T* = 1.5 (Thol et al. 2016 EOS)
    z = 0.7 * 120.0 / 0.34**3 / (1.5 * 120.0)  # beta f in nm^-3 (k = 1 in K units)
    return Box(model, 1.5 * 120.0, z, EngineOptions(insertion_trials=k), rng_state=seed_state(seed))


def methane_slit(width_nm: float) -> PoreModel:
    """Methane (TraPPE-UA LJ) in a graphite slit of width H, r_c = 3 sigma, 3.8 nm lateral box."""
    probe = get_probe("methane")
    return PoreModel(
        probe=probe,
        solid=default_solid(),
        geometry=SLIT,
        cutoff_nm=3.0 * probe.sigma_nm,
        box_nm=3.8,
        width_nm=width_nm,
    )


def slit_box(k: int, seed: int, slab_tail: bool = True) -> Box:
    """Methane at 298.15 K and 20 MPa fugacity in a 1.2 nm graphite slit: a dense, two-layer
    pore fluid with frequent exchanges."""
    model = methane_slit(1.2)
    return Box(
        model,
        298.15,
        activity_per_nm3(2.0e7, 298.15),
        EngineOptions(insertion_trials=k, slab_tail=slab_tail),
        rng_state=seed_state(seed),
    )


CASES = {
    "bulk-plain": lambda: bulk_lj_box(1, 11),
    "bulk-biased-k8": lambda: bulk_lj_box(8, 12),
    "slit-slab-plain": lambda: slit_box(1, 13),
    "slit-slab-biased-k8": lambda: slit_box(8, 14),
    "slit-noslab-plain": lambda: slit_box(1, 15, slab_tail=False),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_running_energy_equals_recomputation_after_long_run(case: str) -> None:
    """Exact bookkeeping identity: after every chunk of a long run, the running U_ff and U_sf
    equal both the engine's own full recomputation and the independent numpy one to 1e-9."""
    box = CASES[case]()
    # 1e6 moves (plain) or 3.2e5 moves (k = 8: each insertion/deletion costs ~8 trials)
    chunks, per = 8, (125_000 if box.insertion_trials == 1 else 40_000)
    for _ in range(chunks):
        box.run(per)
        run_ff, run_sf = box.energy
        re_ff, re_sf = box.recomputed_energy()
        ref_ff, ref_sf = reference_energy(box)
        assert rel_diff(run_ff, re_ff) < REL_TOL, (run_ff, re_ff)
        assert rel_diff(re_ff, ref_ff) < REL_TOL, (re_ff, ref_ff)
        if box.model.geometry == SLIT:
            assert rel_diff(run_sf, re_sf) < REL_TOL, (run_sf, re_sf)
            assert rel_diff(re_sf, ref_sf) < REL_TOL, (re_sf, ref_sf)
        else:
            assert run_sf == 0.0 and re_sf == 0.0
    assert_structures_consistent(box)
    c = box.counters
    # The check is only meaningful if the run exercised every move many times over.
    assert box.n_molecules > 50
    assert c[E.C_INS_ACC] > 500 and c[E.C_DEL_ACC] > 500 and c[E.C_DISP_ACC] > 10_000


def test_lj_pair_and_homogeneous_tail_of_two_molecules() -> None:
    """Two molecules in a bulk cube: U_ff = u_LJ(r) (Jones 1924) + 4 c / V, c from the
    quadrature (1/2) int_rc^inf 4 pi r^2 u dr (Allen & Tildesley); exact to rounding."""
    eps, sig, rc, edge = 120.0, 0.34, 1.02, 2.2
    probe = Probe(name="lj", epsilon_k=eps, sigma_nm=sig)
    model = PoreModel(probe=probe, solid=Solid(), geometry=BULK, cutoff_nm=rc, box_nm=edge)
    box = Box(model, 150.0, 1.0)
    quad, _ = integrate.quad(
        lambda r: 4 * math.pi * r * r * 4 * eps * ((sig / r) ** 12 - (sig / r) ** 6),
        rc,
        math.inf,
        epsabs=0.0,
        epsrel=1e-12,
    )
    c = 0.5 * quad
    assert rel_diff(homogeneous_tail_constant(eps, sig, rc), c) < 1e-9
    for r in (0.33, 0.3816, 0.5, 0.9, 1.05):  # the last one beyond r_c: tail only
        assert box.load_positions(np.array([[0.1, 0.2, 0.3], [0.1 + r, 0.2, 0.3]])) == 2
        u = 4 * eps * ((sig / r) ** 12 - (sig / r) ** 6) if r < rc else 0.0
        uff, usf = box.recomputed_energy()
        assert rel_diff(uff, u + 4 * c / edge**3) < 1e-12
        assert usf == 0.0
        assert rel_diff(box.energy[0], uff) < 1e-15
    # Minimum image across the periodic boundary: 0.1 and edge - 0.3 are 0.4 nm apart.
    box.load_positions(np.array([[0.1, 1.0, 1.0], [edge - 0.3, 1.0, 1.0]]))
    u = 4 * eps * ((sig / 0.4) ** 12 - (sig / 0.4) ** 6)
    assert rel_diff(box.recomputed_energy()[0], u + 4 * c / edge**3) < 1e-9


def test_wall_energy_is_steele_10_4_3_of_both_walls() -> None:
    """One molecule in a slit: U_sf(z) = V(z) + V(H - z), with V the Steele 10-4-3 form
    (Steele 1973) and Lorentz-Berthelot eps_sf, sigma_sf."""
    probe = get_probe("argon")
    solid = default_solid()
    h = 1.4
    model = PoreModel(
        probe=probe, solid=solid, geometry=SLIT, cutoff_nm=1.0215, box_nm=3.5, width_nm=h
    )
    box = Box(model, 87.3, 1.0)
    eps_sf = math.sqrt(probe.epsilon_k * solid.epsilon_k)
    sig_sf = 0.5 * (probe.sigma_nm + solid.sigma_nm)
    rho_s, delta = solid.density_nm3, solid.interlayer_nm
    pre = 2 * math.pi * rho_s * eps_sf * sig_sf**2 * delta
    assert rel_diff(steele_prefactor_k(model), pre) < 1e-14

    def v(z: float) -> float:
        return pre * (
            0.4 * (sig_sf / z) ** 10
            - (sig_sf / z) ** 4
            - sig_sf**4 / (3 * delta * (z + 0.61 * delta) ** 3)
        )

    for z in (0.3, 0.35, 0.45, 0.7):
        box.load_positions(np.array([[1.0, 1.0, z]]))
        uff, usf = box.recomputed_energy()
        assert rel_diff(usf, v(z) + v(h - z)) < 1e-12
        assert rel_diff(box.energy[1], usf) < 1e-15


def test_slab_tail_of_two_molecules_matches_quadrature() -> None:
    """Two molecules far apart in z in a wide slit (no pair within r_c): U_ff is the slab tail
    (1/A) 2 pi int_|dz|^inf r u(r) dr (Janecek 2006) by quadrature; with molecules at z-bin
    centres the engine's binned distance is exact, so the agreement is to rounding."""
    probe = get_probe("methane")
    eps, sig = probe.epsilon_k, probe.sigma_nm
    rc, edge, h = 3.0 * sig, 3.8, 4.0
    model = PoreModel(
        probe=probe, solid=default_solid(), geometry=SLIT, cutoff_nm=rc, box_nm=edge, width_nm=h
    )
    box = Box(model, 298.15, 1.0)
    nb = box.n_bins
    dz = h / nb

    def tail(dz_nm: float) -> float:
        a = max(dz_nm, rc)
        val, _ = integrate.quad(
            lambda r: r * 4 * eps * ((sig / r) ** 12 - (sig / r) ** 6),
            a,
            math.inf,
            epsabs=0.0,
            epsrel=1e-12,
        )
        return 2 * math.pi * val / edge**2

    for b1, b2 in ((100, 100 + int(1.3 / dz)), (80, 80 + int(2.5 / dz)), (300, 301)):
        z1, z2 = (b1 + 0.5) * dz, (b2 + 0.5) * dz
        # Laterally 0.45 * edge apart in x and y: beyond r_c whatever dz (0.45*3.8*sqrt2 > rc).
        pos = np.array([[0.1, 0.1, z1], [0.1 + 0.45 * edge, 0.1 + 0.45 * edge, z2]])
        assert box.load_positions(pos) == 2
        r = math.sqrt(2 * (0.45 * edge) ** 2 + (z2 - z1) ** 2)
        assert r > rc
        uff, _ = box.recomputed_energy()
        assert rel_diff(uff, tail(abs(b2 - b1) * dz)) < 1e-9
    # Slab tail off: nothing beyond the cutoff.
    off = Box(model, 298.15, 1.0, EngineOptions(slab_tail=False))
    off.load_positions(pos)
    assert off.recomputed_energy()[0] == 0.0


def test_load_positions_drops_overlaps_and_outside_molecules() -> None:
    """Loading a configuration keeps only molecules inside the pore and not overlapping; the
    energy is then that of the kept molecules (bookkeeping identity)."""
    box = slit_box(1, 3)
    h = box.model.width_nm
    pos = np.array(
        [
            [0.5, 0.5, 0.6],
            [0.5, 0.5, 0.6005],  # second overlaps the first
            [1.0, 1.0, -0.1],
            [1.0, 1.0, h + 0.1],  # outside the slit
            [2.0, 2.0, 0.6],
            [4.3, 2.0, 0.6],
        ]
    )  # x wraps into the box: 0.5 nm away
    assert box.load_positions(pos) == 3
    assert rel_diff(box.energy[0], reference_energy(box)[0]) < 1e-12
    assert rel_diff(box.energy[1], reference_energy(box)[1]) < 1e-12
    assert_structures_consistent(box)
    again = slit_box(1, 4)
    assert again.load_positions(box.positions()) == 3
    np.testing.assert_allclose(again.positions(), box.positions(), rtol=0, atol=0)


@pytest.mark.parametrize("geometry", [SLIT, BULK])
def test_coincident_positions_are_an_overlap(geometry: str) -> None:
    """A molecule exactly on top of another (distance 0, e.g. a duplicated line in a start
    configuration) is an overlap like any pair closer than r_ov: it is dropped on loading and
    the energy stays finite (bookkeeping identity with the one molecule kept)."""
    box = slit_box(1, 5) if geometry == SLIT else bulk_lj_box(1, 5)
    p = [1.0, 1.0, 0.6]
    assert box.load_positions(np.array([p, p, [1.0, 1.0, 0.6 + 1e-12]])) == 1
    assert np.all(np.isfinite(box.energy))
    assert rel_diff(box.energy[0], reference_energy(box)[0]) < 1e-12 or box.energy[0] == 0.0
    dff, dsf, overlap = E.trial_energy(
        *p,
        -1,
        -1,
        1,
        -1,
        box.fp,
        box.ip,
        box.cell_xyz,
        box.cell_n,
        box.nbr,
        box.nbr_n,
        box.zbin_n,
        box.tail_table,
    )
    assert overlap


def test_simulate_point_is_deterministic_in_its_seed() -> None:
    """The result is a pure function of (model, state, settings, seed): same seed, same numbers
    (reproducible streams: common practice); a different seed gives a different trajectory."""
    model = methane_slit(1.0)
    state = ThermoState(temperature_K=298.15, fugacity_Pa=1.0e6)
    settings = SamplingSettings(
        replicas=1,
        equilibration_moves=20_000,
        production_moves=60_000,
        sample_every=100,
        insertion_trials=1,
    )
    a = simulate_point(model, state, settings, 99).result
    b = simulate_point(model, state, settings, 99).result
    c = simulate_point(model, state, settings, 100).result

    def numbers(r: object) -> str:  # NaN-safe comparison of everything but the wall time
        return json.dumps(r.to_dict() | {"seconds": 0.0}, sort_keys=True)

    assert numbers(a) == numbers(b)
    assert a.molecules_mean != c.molecules_mean


def _dense_methane_pore() -> tuple[PoreModel, ThermoState]:
    model = methane_slit(0.8)
    return model, ThermoState(temperature_K=298.15, fugacity_Pa=3.0e6)


def test_second_replica_starts_above_the_first_or_the_point_is_flagged() -> None:
    """Two-sided convergence check: the second replica starts over-filled (half an
    equilibration at 20 z), above the first replica's mean; one that did not start above
    (here: emptied at 1e-6 z instead of over-filled) flags the point as not bracketed, hence
    unconverged, whatever the replicas' agreement."""
    model = methane_slit(1.2)
    state = ThermoState(temperature_K=298.15, fugacity_Pa=1.0e6)
    base = dict(
        equilibration_moves=20_000,
        production_moves=40_000,
        sample_every=100,
        insertion_trials=1,
        replicas=2,
    )
    ok = simulate_point(model, state, SamplingSettings(**base), 7).result
    assert not fl.has_flag(ok.flags, fl.NOT_BRACKETED), ok.flags
    # "over-filling" at 1e-6 of the activity empties the pore: the second replica starts
    # from (nearly) nothing, below the first one's mean
    low = SamplingSettings(**base, overfill_factor=1e-6)
    bad = simulate_point(model, state, low, 7).result
    assert bad.replica_means[0] > 0
    assert fl.has_flag(bad.flags, fl.NOT_BRACKETED), bad.flags
    assert not bad.converged


def test_a_replica_that_barely_exchanged_is_flagged() -> None:
    """N changes only through insertions and deletions: a replica whose production accepted
    fewer of them than it holds molecules (a frozen packing: the filled 3 sigma pore at 87 K,
    benchmarks/README.md) is flagged few_exchanges and the point is unconverged, even when
    its N series looks perfectly stationary; the same series with ample exchanges is not."""
    from gcmc.sampling.point import _analyse, _ReplicaRun

    model, state = _dense_methane_pore()
    box = Box(model, 298.15, state.activity_nm3)
    rng = np.random.default_rng(0)
    settings = SamplingSettings(replicas=1, sample_every=100)

    def run(exchanges: int) -> _ReplicaRun:
        n = 180 + rng.integers(-2, 3, size=4000)  # stationary, uncorrelated
        u = -1000.0 * n + rng.normal(0, 50, size=n.size)
        return _ReplicaRun(
            n=n,
            uff=u,
            usf=u,
            profile=np.zeros(box.n_bins),
            box=box,
            moves=400_000,
            seconds=1.0,
            t0=0,
            k_trials=1,
            acceptance={},
            exchanges=exchanges,
        )

    starved = _analyse(model, state, settings, [run(60)]).result
    assert fl.has_flag(starved.flags, fl.FEW_EXCHANGES, replica=0)
    assert not starved.converged
    ample = _analyse(model, state, settings, [run(5000)]).result
    assert not fl.has_flag(ample.flags, fl.FEW_EXCHANGES), ample.flags


def test_target_error_stops_easy_points_early_and_hard_ones_at_the_budget() -> None:
    """Stop when done: with a target relative error, a two-layer methane pore fluid (1.2 nm,
    1 MPa, well exchanging) stops long before its move budget, meets the target and is
    converged; an unreachable target uses the whole budget and says so (target_not_reached,
    unconverged)."""
    model = methane_slit(1.2)
    state = ThermoState(temperature_K=298.15, fugacity_Pa=1.0e6)
    base = dict(
        equilibration_moves=20_000,
        production_moves=40_000,
        sample_every=50,
        insertion_trials=1,
        replicas=2,
        max_production_moves=2_000_000,
    )
    easy = simulate_point(model, state, SamplingSettings(**base, target_rel_stderr=0.02), 3)
    r = easy.result
    budget_all = 2 * (2_000_000 + 20_000) + 10_000  # replicas x (budget + eq) + over-fill
    assert r.moves < 0.5 * budget_all, r.moves
    assert r.molecules_stderr / r.molecules_mean <= 0.02 and r.converged, r.flags
    hard = simulate_point(model, state, SamplingSettings(**base, target_rel_stderr=1e-5), 3)
    assert hard.result.moves == budget_all
    assert fl.has_flag(hard.result.flags, fl.TARGET_NOT_REACHED)
    assert not hard.result.converged


def test_absolute_error_floor_meets_the_target_at_low_loading() -> None:
    """The precision target with an absolute floor (the experiment's absolute noise, as in
    gcmc check's point_errors): a dilute methane point (1.2 nm, 10 kPa, about 0.3 molecules;
    replica errors about 1.5 % after 100 000 moves) cannot reach 0.5 % relative error in its
    budget, so without a floor it runs to the budget and is flagged target_not_reached; with
    a floor of 5 molecules (error allowed: 0.025 molecules) it stops at production_moves;
    with target_flags off, a missed target leaves no flag (a quality-target build judges the
    point in gcmc check instead)."""
    model = replace(methane_slit(1.2), box_nm=2.4)
    state = ThermoState(temperature_K=298.15, fugacity_Pa=1.0e4)
    base = dict(
        equilibration_moves=5_000,
        production_moves=20_000,
        sample_every=4,
        insertion_trials=1,
        replicas=2,
        max_production_moves=100_000,
        target_rel_stderr=0.005,
    )
    strict = simulate_point(model, state, SamplingSettings(**base), 5).result
    budget_all = 2 * (100_000 + 5_000) + 2_500  # replicas x (budget + eq) + over-fill
    assert strict.moves == budget_all, strict.moves
    assert fl.has_flag(strict.flags, fl.TARGET_NOT_REACHED), strict.flags
    floor = 5.0 / model.pore_volume_nm3  # 5 molecules as a density of the pore volume
    met = simulate_point(model, state, SamplingSettings(**base, stderr_floor_per_nm3=floor), 5)
    assert met.result.moves == 2 * (20_000 + 5_000) + 2_500, met.result.moves
    assert met.result.converged, met.result.flags
    quiet = simulate_point(model, state, SamplingSettings(**base, target_flags=False), 5).result
    assert quiet.moves == budget_all and not fl.has_flag(quiet.flags, fl.TARGET_NOT_REACHED)


def test_larger_move_budget_extends_only_points_not_yet_certified() -> None:
    """Without a precision target, a move budget above production_moves extends production
    only while a point is not certified. A short run of a methane pore fluid (1.2 nm, 0.3 MPa,
    about 10 molecules in a 2.4 nm box) has no block-averaging plateau (error_unreliable at
    every seed); given the budget, it runs on until the error is reliable, stops well before
    the budget, and is converged. A point already certified at production_moves (the
    dilute gas at 10 kPa) stops there: the same moves and the same mean, bit for bit."""
    model = replace(methane_slit(1.2), box_nm=2.4)
    base = dict(
        equilibration_moves=10_000,
        production_moves=4_000,
        sample_every=4,
        insertion_trials=1,
        replicas=2,
    )
    dense = ThermoState(temperature_K=298.15, fugacity_Pa=3.0e5)
    budget = 300_000
    for seed in (1, 2):
        fixed = simulate_point(model, dense, SamplingSettings(**base), seed).result
        assert fl.has_flag(fixed.flags, fl.ERROR_UNRELIABLE) and not fixed.converged
        ext = simulate_point(
            model, dense, SamplingSettings(**base, max_production_moves=budget), seed
        ).result
        assert ext.converged and not ext.flags, ext.flags
        assert fixed.moves < ext.moves < 2 * (budget + 10_000), ext.moves
    dilute = ThermoState(temperature_K=298.15, fugacity_Pa=1.0e4)
    easy = dict(base, production_moves=40_000)
    fixed = simulate_point(model, dilute, SamplingSettings(**easy), 5).result
    assert fixed.converged, fixed.flags
    ext = simulate_point(
        model, dilute, SamplingSettings(**easy, max_production_moves=budget), 5
    ).result
    assert (ext.moves, ext.molecules_mean) == (fixed.moves, fixed.molecules_mean)


def test_replicas_run_on_until_they_agree() -> None:
    """The stopping rule of _produce_replicas with scripted replicas: each meets its own
    target from the first check, but their means agree (within 3 combined errors) only from
    the fourth chunk on; production stops there, not before, and not later."""
    from gcmc.sampling.point import _produce_replicas

    class Scripted:
        def __init__(self, means: list[float]) -> None:
            self.means, self.chunk, self.calls = means, 1, 0

        @property
        def exhausted(self) -> bool:
            return self.calls >= len(self.means)

        def produce(self, moves: int) -> None:
            self.calls += 1

        def meets_target(self) -> tuple[bool, float, float]:
            return True, self.means[self.calls - 1], 0.1

    a = Scripted([10.0, 10.0, 10.0, 10.0, 10.0, 10.0])
    b = Scripted([12.0, 11.5, 11.0, 10.2, 10.1, 10.0])
    settings = SamplingSettings(target_rel_stderr=0.01, agreement_rel=0.0)
    _produce_replicas([a, b], settings)  # type: ignore[list-item]
    assert a.calls == b.calls == 4


def test_replicas_of_a_point_sample_with_one_insertion_method(monkeypatch) -> None:  # noqa: ANN001
    """The replica from below and the over-filled one must sample one ensemble with one
    method: the insertion method (plain or biased) is decided once per point, for both.
    Methane in a 1 nm slit at 0.3 MPa fugacity: plain insertion is accepted well above the
    3 % threshold at the point's activity, but not in the over-filled preparation at 20 z (a
    replica deciding from its own over-filled start would switch to biased insertion alone)."""
    import gcmc.sampling.point as point_mod

    seen: list[list[int]] = []
    analyse = point_mod._analyse

    def spy(model, state, settings, runs):  # noqa: ANN001, ANN202
        seen.append([r.k_trials for r in runs])
        return analyse(model, state, settings, runs)

    monkeypatch.setattr(point_mod, "_analyse", spy)
    model = methane_slit(1.0)
    state = ThermoState(temperature_K=298.15, fugacity_Pa=3.0e5)
    settings = SamplingSettings(
        equilibration_moves=20_000, production_moves=4_000, sample_every=100, replicas=2
    )
    out = simulate_point(model, state, settings, 5).result
    assert len(set(seen[-1])) == 1, f"replicas sampled with k = {seen[-1]}"
    assert out.replica_insertion_trials == seen[-1]
    assert out.insertion_trials == seen[-1][0]


def test_shared_insertion_rule_takes_the_most_demanding_replica() -> None:
    """The shared rule: a configured method is used as given; automatic: biased insertion for
    all replicas when any replica's plain-insertion acceptance at the point's activity is
    below the threshold (with a molecule in the pore) or its over-filled preparation switched
    to biased insertion; plain insertion for all otherwise."""
    from gcmc.sampling.point import shared_insertion_trials

    auto = SamplingSettings(insertion_trials=0, biased_trials=64, bias_threshold=0.03)
    assert shared_insertion_trials(SamplingSettings(insertion_trials=8), [10], [0], [True]) == 8
    # 2 % in one replica, 6 % in the other: biased for both
    assert shared_insertion_trials(auto, [1000, 1000], [20, 60], [True, True]) == 64
    # 4 % and 6 %: plain for both
    assert shared_insertion_trials(auto, [1000, 1000], [40, 60], [True, True]) == 1
    # ... unless the over-filled preparation needed biased insertion
    assert shared_insertion_trials(auto, [1000, 1000], [40, 60], [True, True], [1, 64]) == 64
    # nothing held (an inaccessible or empty pore) or nothing measured: plain
    assert shared_insertion_trials(auto, [1000, 1000], [0, 0], [False, False]) == 1
    assert shared_insertion_trials(auto, [0, 0], [0, 0], [True, True]) == 1
