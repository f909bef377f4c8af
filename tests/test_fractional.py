"""The fractional-molecule exchange move (continuous fractional component MC, Shi & Maginn, J.
Chem. Theory Comput. 3 (2007) 1451; gcmc.sampling.fractional) against exact limits and the LJ
equation of state.

Each check names its reference beside it:

- detailed balance of the lambda and exchange moves in the ideal gas (exact): N is Poisson with
  mean z V, lambda is distributed as exp(W(lambda)) for a fixed bias W, independent of N;
- the excess chemical potential of two molecules in a periodic box (exact, a one-dimensional
  quadrature of the Mayer function with the homogeneous tail of the model);
- energy bookkeeping in a slit with the slab tail against a full recomputation (exact);
- beta mu_ex of the dense bulk LJ fluid against the full-potential LJ equation of state of
  Thol et al., J. Phys. Chem. Ref. Data 45 (2016) 023101 (teqp), with the spread of two
  other published LJ equations of state (Johnson, Zollweg & Gubbins 1993; Kolafa & Nezbeda
  1994, teqp) as the reference's uncertainty;
- the grand canonical density of the bulk LJ fluid at an activity from the same equation of
  state.

Fixed seeds; tolerances are k standard errors from the run's own block (batch-means) errors,
stated beside each check.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate

from gcmc.physics.model import BULK, SLIT, PoreModel, Probe, Solid
from gcmc.physics.potentials import homogeneous_tail_constant, slit_pore
from gcmc.sampling.fractional import (
    FractionalOptions,
    FractionalSampler,
    end_log_ratio,
    excess_chemical_potential,
    growth_transits,
    uncoupled_mean,
    window_log_distribution,
)
from gcmc.sampling.rng import seed_state
from gcmc.sampling.statistics import block_average

#: Argon-like numbers for reduced-unit states (invented for the tests).
EPS_K, SIG_NM = 120.0, 0.34
LJ = Probe(name="lj-reduced", epsilon_k=EPS_K, sigma_nm=SIG_NM)


def lattice_positions(n: int, length_nm: float, seed: int) -> np.ndarray:
    """n sites drawn from a simple cubic lattice filling the cube (no overlaps)."""
    m = int(math.ceil(n ** (1 / 3)))
    g = (np.arange(m) + 0.5) / m * length_nm
    sites = np.array([(a, b, c) for a in g for b in g for c in g])
    pick = np.random.default_rng(seed).choice(len(sites), n, replace=False)
    return sites[pick]


def run_samples(s: FractionalSampler, n_samples: int, every: int):
    out_n = np.zeros(n_samples, dtype=np.int64)
    out_lam = np.zeros(n_samples)
    out_u = np.zeros(n_samples)
    s.run(n_samples * every, every, out_n, out_lam, out_u)
    return out_n, out_lam, out_u


def teqp_beta_mu_ex(kind: str, t_star: float, rho_star: float) -> float:
    """Residual chemical potential beta mu_ex = alpha^r + rho d alpha^r / d rho (pure fluid)."""
    import teqp

    model = teqp.make_model({"kind": kind, "model": {}})
    a0, a1 = model.get_Ar01n(t_star, rho_star, np.array([1.0]))
    return float(a0 + a1)


# =============================================================================================
# 1. Ideal gas: detailed balance of the lambda and exchange moves (exact)
# =============================================================================================

IDEAL = Probe(name="ideal", epsilon_k=1e-9, sigma_nm=SIG_NM)


def test_ideal_gas_poisson_and_lambda_bias() -> None:
    """Exact limit: without interactions the expanded ensemble factorises, so N is Poisson
    with mean z V (var N = <N>) and lambda has density exp(W(lambda)) / int exp(W), whatever
    the bias. A wrong exchange rule (z V / N instead of z V / (N + 1), or a missing or
    reversed W) moves <N> by >= 0.5 or <lambda> by >= 0.05: many standard errors."""
    # near-zero epsilon: overlaps below 0.027 nm only, their second-virial effect on <N> is
    # below 2e-3 (tests/test_engine_physics.py checks that number for this box)
    model = PoreModel(probe=IDEAL, solid=Solid(), geometry=BULK, cutoff_nm=1.02, box_nm=2.04)
    zv = 3.0
    nb = 10
    opts = FractionalOptions(
        whole_displacement=0.1, fractional_displacement=0.1, max_dlambda=0.5, n_lambda_bins=nb
    )
    s = FractionalSampler(model, 300.0, zv / model.volume_nm3, True, opts, rng_state=seed_state(7))
    s.weights[:] = np.linspace(0.0, 1.5, nb)  # a fixed, non-flat bias
    s.place_fractional(0.3)
    s.run(10_000)
    n, lam, _ = run_samples(s, 400_000, 10)
    assert s.exchanges > 100_000
    # <N> = z V (exact); 4 block-averaged standard errors (Flyvbjerg & Petersen 1989)
    est = block_average(n.astype(float))
    assert est.reliable
    assert abs(est.mean - zv) < 4.0 * est.stderr, (est.mean, est.stderr)
    # var N = <N> (Poisson, exact): the relative error of a variance of n_eff samples of a
    # Poisson(3) variable is sqrt((2 + 1/<N>) / n_eff); 4 of them
    rel = math.sqrt((2.0 + 1.0 / zv) / est.n_effective)
    assert abs(n.var() / zv - 1.0) < 4.0 * rel, (n.var(), rel)
    # <lambda> with density ~ exp(W) on the bins (exact)
    w = np.exp(s.weights)
    lam_exact = float(np.sum(w * (np.arange(nb) + 0.5) / nb) / w.sum())
    el = block_average(lam)
    assert abs(el.mean - lam_exact) < 4.0 * el.stderr, (el.mean, lam_exact, el.stderr)
    # and the two are independent (exact): <N> in the lowest and highest lambda bin agree
    lo = n[lam < 1.0 / nb].astype(float)
    hi = n[lam >= 1.0 - 1.0 / nb].astype(float)
    e_lo, e_hi = block_average(lo), block_average(hi)
    assert abs(e_lo.mean - e_hi.mean) < 4.0 * math.hypot(e_lo.stderr, e_hi.stderr)


def test_ideal_gas_window_bias_recovers_poisson() -> None:
    """Exact limit: with a bias on (N, lambda) over a window of N (Wang-Landau flattened,
    then fixed), the reweighted uncoupled states give the Poisson ln p(N) = N ln(zV) -
    ln N! + const within the window. A wrong exchange rule (z V / N) shifts ln p(N+1) -
    ln p(N) by ln((N+1)/N) >= 0.18 per step; checked at 4 batch-means errors per N."""
    model = PoreModel(probe=IDEAL, solid=Solid(), geometry=BULK, cutoff_nm=1.02, box_nm=2.04)
    zv, nb, nw, nmin = 3.0, 10, 6, 1
    opts = FractionalOptions(
        whole_displacement=0.1,
        fractional_displacement=0.1,
        max_dlambda=0.5,
        n_lambda_bins=nb,
        n_window=nw,
    )
    s = FractionalSampler(model, 300.0, zv / model.volume_nm3, True, opts, rng_state=seed_state(3))
    s.set_window(nmin)
    s.load_positions(np.array([[0.1, 0.1, 0.1], [1.0, 1.0, 1.0]]), 0.0)
    s.flatten_weights(50_000, 0.5, 1e-3)
    n, lam, _ = run_samples(s, 400_000, 10)
    assert n.min() >= nmin and n.max() < nmin + nw  # the window holds
    k = np.arange(nmin, nmin + nw)
    exact = k * math.log(zv) - np.array([math.lgamma(x + 1.0) for x in k])
    exact -= exact[0]
    blocks = []
    for nn, ll in zip(np.array_split(n, 16), np.array_split(lam, 16), strict=True):
        lp = window_log_distribution(nn, ll, s.weights, nmin, nw)
        blocks.append(lp - lp[0])
    blocks = np.array(blocks)
    assert np.all(np.isfinite(blocks))
    err = blocks.std(axis=0, ddof=1) / 4.0  # sqrt(16 blocks)
    lp = window_log_distribution(n, lam, s.weights, nmin, nw)
    lp -= lp[0]
    assert np.all(np.abs(lp - exact)[1:] < 4.0 * err[1:]), (lp, exact, err)


# =============================================================================================
# 2. Two molecules: the lambda distribution's end points against an exact quadrature
# =============================================================================================


def test_two_molecules_end_ratio_exact() -> None:
    """Exact: one whole molecule and the fractional one in a periodic cube of edge L with
    r_c <= L/2. p(1)/p(0) = Q_2 / (V Q_1) = exp(-beta 3c/V) (1/V) [V - 4/3 pi r_c^3 +
    4 pi int_0^rc exp(-beta u) r^2 dr], the tail term being the model's homogeneous tail
    (U_tail = N^2 c / V: (2N + 1) c / V for the second molecule). Checks the soft-core path
    end points, the lambda moves with their bias and the tail bookkeeping. 4 standard errors
    (batch means over 16 blocks)."""
    t = 1.0 * EPS_K
    box = 2.4 * SIG_NM
    rc = 1.2 * SIG_NM
    model = PoreModel(probe=LJ, solid=Solid(), geometry=BULK, cutoff_nm=rc, box_nm=box)
    opts = FractionalOptions(
        whole_displacement=0.3, fractional_displacement=0.3, max_dlambda=0.2, n_lambda_bins=40
    )
    s = FractionalSampler(model, t, 1.0, False, opts, rng_state=seed_state(11))
    s.load_positions(np.array([[0.1, 0.1, 0.1]]), 0.0)
    s.place_fractional(0.0, np.array([0.5, 0.5, 0.5]) * box)
    s.flatten_weights(20_000, ln_f_start=0.5, ln_f_end=2e-3)
    _, lam, _ = run_samples(s, 800_000, 5)
    est, err = excess_chemical_potential(lam, s.weights, n_blocks=16)
    # exact
    v = box**3

    def integrand(r: float) -> float:
        s6 = (SIG_NM / r) ** 6
        return math.exp(-4.0 * EPS_K * (s6 * s6 - s6) / t) * r * r

    quad, _ = integrate.quad(integrand, 0.5 * SIG_NM, rc, limit=200)
    inner = v - 4.0 / 3.0 * math.pi * rc**3 + 4.0 * math.pi * quad
    c = homogeneous_tail_constant(EPS_K, SIG_NM, rc)
    exact = -(-3.0 * c / v / t + math.log(inner / v))  # beta mu_ex = -ln p(1)/p(0)
    assert math.isfinite(err) and err < 0.05
    assert abs(est - exact) < 4.0 * err, (est, exact, err)


# =============================================================================================
# 3. Energy bookkeeping with every move in a slit with the slab tail (exact)
# =============================================================================================


def test_bookkeeping_slit_grand_canonical() -> None:
    """Exact: after many moves of every kind (whole and fractional displacements, lambda
    changes, insertions and deletions through lambda) the running energies equal a full
    recomputation, in a slit with walls and the slab tail correction."""
    model = slit_pore(LJ, 3.0 * SIG_NM, 10.0 * SIG_NM)
    s = FractionalSampler(model, 1.2 * EPS_K, 8.0, True, rng_state=seed_state(5))
    s.place_fractional(0.0)
    s.run(200_000)
    acc = s.acceptance()
    assert s.counters[7] > 50 and s.counters[9] > 50  # insertions and deletions accepted
    assert s.n_whole > 20, acc
    uff, usf = s.box.recomputed_energy()
    assert abs(s.box.energy[0] - uff) < 1e-7 * max(1.0, abs(uff))
    assert abs(s.box.energy[1] - usf) < 1e-7 * max(1.0, abs(usf))
    fu, fw = s.recomputed_fractional_energy()
    assert abs(s.fstate[4] - fu) < 1e-7 * max(1.0, abs(fu))
    assert abs(s.fstate[5] - fw) < 1e-7 * max(1.0, abs(fw))
    assert model.geometry == SLIT and s.box.ip[7] == 1  # the slab tail was on


# =============================================================================================
# 4. Dense bulk LJ: mu_ex against the Thol et al. (2016) equation of state
# =============================================================================================


def _bulk_mu_ex(t_star: float, rho_star: float, n: int, moves: int, seed: int):
    length = (n / rho_star) ** (1 / 3) * SIG_NM
    # r_c = 3 sigma with the homogeneous tail: the full potential the EOS describes
    model = PoreModel(probe=LJ, solid=Solid(), geometry=BULK, cutoff_nm=3 * SIG_NM, box_nm=length)
    opts = FractionalOptions(
        whole_displacement=0.5, fractional_displacement=0.1, max_dlambda=0.1, n_lambda_bins=50
    )
    s = FractionalSampler(model, t_star * EPS_K, 1.0, False, opts, rng_state=seed_state(seed))
    s.load_positions(lattice_positions(n, length, seed), 0.0)
    assert s.n_whole == n
    s.run(200 * n)  # melt the lattice
    s.flatten_weights(200_000, ln_f_start=0.5, ln_f_end=2e-3)
    _, lam, _ = run_samples(s, moves // 10, 10)
    return excess_chemical_potential(lam, s.weights, n_blocks=16)


def _eos_tolerance(t_star: float, rho_star: float) -> tuple[float, float]:
    ref = teqp_beta_mu_ex("LJ126_TholJPCRD2016", t_star, rho_star)
    spread = max(
        abs(ref - teqp_beta_mu_ex(k, t_star, rho_star))
        for k in ("LJ126_Johnson1993", "LJ126_KolafaNezbeda1994")
    )
    return ref, spread


def test_dense_bulk_mu_ex_against_thol_eos() -> None:
    """beta mu_ex of the LJ fluid at T* = 2.0, rho* = 0.7 (N = 256) against Thol et al. (2016)
    via teqp: within 3 block standard errors plus the spread of the Johnson et al. (1993) and
    Kolafa-Nezbeda (1994) equations of state at the state (teqp), our stand-in for the EOS's
    own uncertainty. Finite N shifts Widom-type mu_ex by O(1/N) (0.03 kT between the EOS at
    N/V and (N+1)/V here), covered by that spread."""
    est, err = _bulk_mu_ex(2.0, 0.7, 256, 20_000_000, 3)
    ref, spread = _eos_tolerance(2.0, 0.7)
    assert math.isfinite(err) and err < 0.08
    assert abs(est - ref) < 3.0 * err + spread, (est, err, ref, spread)


@pytest.mark.slow
def test_dense_bulk_mu_ex_against_thol_eos_long() -> None:
    """As above, 10x the moves and a denser, colder state (T* = 1.5, rho* = 0.8, N = 256)."""
    est, err = _bulk_mu_ex(1.5, 0.8, 256, 200_000_000, 4)
    ref, spread = _eos_tolerance(1.5, 0.8)
    assert math.isfinite(err) and err < 0.05
    assert abs(est - ref) < 3.0 * err + spread, (est, err, ref, spread)


def test_end_ratio_needs_both_ends() -> None:
    """A lambda series that never reached an end gives NaN, not a number."""
    lam = np.random.default_rng(0).uniform(0.3, 0.7, 1000)
    assert math.isnan(end_log_ratio(lam, np.zeros(20)))


# =============================================================================================
# 5. Grand canonical: the density at the activity of the EOS
# =============================================================================================


def _eos_density_at_activity(kind: str, t_star: float, ln_z_star: float) -> float:
    """rho* with ln rho* + beta mu_ex(rho*) = ln z* (one liquid-like root above rho* = 0.4
    at the supercritical state used)."""
    from scipy.optimize import brentq

    return brentq(
        lambda r: math.log(r) + teqp_beta_mu_ex(kind, t_star, r) - ln_z_star, 0.4, 1.0, xtol=1e-12
    )


def test_grand_canonical_density_against_thol_eos() -> None:
    """Dense bulk LJ, T* = 2.0, at the activity z* = rho* exp(beta mu_ex) that Thol et al.
    (2016, teqp) give for rho* = 0.7: the density of the lambda ~ 0 states (grand canonical
    states of the whole molecules, see gcmc.sampling.fractional) is that rho* within 3 block
    standard errors plus the spread of the Johnson et al. (1993) and Kolafa-Nezbeda (1994)
    densities at the same activity (teqp). Exercises the exchange transitions with
    interactions (about 4e5 accepted)."""
    t_star, rho_star, n0 = 2.0, 0.7, 256
    ln_z = math.log(rho_star) + teqp_beta_mu_ex("LJ126_TholJPCRD2016", t_star, rho_star)
    length = (n0 / rho_star) ** (1 / 3) * SIG_NM
    model = PoreModel(probe=LJ, solid=Solid(), geometry=BULK, cutoff_nm=3 * SIG_NM, box_nm=length)
    opts = FractionalOptions(
        whole_displacement=0.5, fractional_displacement=0.1, max_dlambda=0.1, n_lambda_bins=50
    )
    z_nm3 = math.exp(ln_z) / SIG_NM**3
    s = FractionalSampler(model, t_star * EPS_K, z_nm3, True, opts, rng_state=seed_state(2))
    s.load_positions(lattice_positions(n0, length, 1), 0.0)
    s.run(200 * n0)
    s.flatten_weights(200_000, ln_f_start=0.5, ln_f_end=2e-3)
    s.counters[:] = 0
    n, lam, _ = run_samples(s, 2_000_000, 10)
    assert s.exchanges > 100_000
    # batch means over 16 blocks of 125 000 samples (1.25e6 moves, many N relaxation times)
    rho, err = uncoupled_mean(n * SIG_NM**3 / model.volume_nm3, lam, len(s.weights))
    assert math.isfinite(err) and err < 0.004
    spread = max(
        abs(rho_star - _eos_density_at_activity(k, t_star, ln_z))
        for k in ("LJ126_Johnson1993", "LJ126_KolafaNezbeda1994")
    )
    assert abs(rho - rho_star) < 3.0 * err + spread, (rho, err, spread)


def test_growth_transits_counts_net_unit_moves() -> None:
    """Exact (by construction): N + lambda 0.05 -> 0.95 -> 1.02 (crossed) -> 1.97 is two
    transits; flickering around one integer is none."""
    n = np.array([3, 3, 4, 4, 4, 5])
    lam = np.array([0.05, 0.95, 0.02, 0.5, 0.97, 0.01])
    assert growth_transits(n, lam) == 2
    assert growth_transits(np.array([3, 4, 3, 4]), np.array([0.98, 0.03, 0.97, 0.01])) == 0


def test_bad_options_name_the_field() -> None:
    """Bad input: a one-line error naming the field."""
    from gcmc.errors import InputError

    model = PoreModel(probe=LJ, solid=Solid(), geometry=BULK, cutoff_nm=1.02, box_nm=2.04)
    with pytest.raises(InputError, match="max_dlambda"):
        FractionalSampler(model, 240.0, 1.0, options=FractionalOptions(max_dlambda=1.5))
    s = FractionalSampler(model, 240.0, 1.0)
    with pytest.raises(InputError, match="coupling"):
        s.place_fractional(1.2)
