"""The equilibrium transition from the two metastable branches (gcmc.kernel.equilibrium).

Reference: the mean-field lattice gas (Bragg-Williams; in adsorption the Fowler-Guggenheim
isotherm, b f = [theta/(1-theta)] exp(-c theta), c in kT units; Fowler & Guggenheim,
*Statistical Thermodynamics*, 1939, from memory), whose every property used here is exact:
- grand potential per volume, beta Omega/V = n_m [ln(1-theta) + c theta^2/2] (exact limit:
  its derivative in ln f is -n, and it tends to -n, the ideal gas, as theta -> 0);
- spinodals at theta(1-theta) = 1/c (the extrema of ln f(theta)); a loop for c > 4;
- coexistence by particle-hole symmetry at ln(b f_eq) = -c/2 (exact; the Maxwell equal-area
  construction gives the same).
The two metastable branches are the curve's lower and upper parts, cut at the spinodals (the
jumps of an ideal adsorption and desorption ladder), sampled on a coarse grid as a kernel is.
The bulk is made non-ideal (ln phi = -p/P_S, an invented virial-like gas) so that ln f and ln p
differ and the test can tell which one is integrated.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from set_kernels import small

from gcmc.cli.kernel import equilibrium_line
from gcmc.errors import InputError
from gcmc.kernel import equilibrium as eq
from gcmc.kernel.reader import open_kernel
from gcmc.kernel.writer import write_kernel

N_M, C = 20.0, 6.0  # nm^-3; c in kT
F_EQ = 1.0e4  # Pa: the exact transition fugacity (b chosen for it)
B = np.exp(-C / 2) / F_EQ
P_S = 5.0e4  # Pa: ln phi = -p / P_S
TM = (1 - np.sqrt(1 - 4 / C)) / 2  # spinodal densities theta_-, theta_+
TP = 1 - TM


def lnf_of_theta(t):
    return np.log(t / (1 - t)) - C * t - np.log(B)


F_UP = float(np.exp(lnf_of_theta(TM)))  # the adsorption branch jumps above this fugacity
F_DN = float(np.exp(lnf_of_theta(TP)))  # the desorption branch drops below this one


def f_of_p(p):
    return p * np.exp(-p / P_S)


def p_of_f(f: float) -> float:
    lo, hi = 0.0, 10 * f + 1
    for _ in range(200):
        m = (lo + hi) / 2
        lo, hi = (m, hi) if f_of_p(m) < f else (lo, m)
    return (lo + hi) / 2


def _theta(lnf, a, b):
    lo, hi = np.full_like(lnf, a), np.full_like(lnf, b)
    for _ in range(200):
        m = (lo + hi) / 2
        up = lnf_of_theta(m) < lnf
        lo, hi = np.where(up, m, lo), np.where(up, hi, m)
    return (lo + hi) / 2


def branches(f, c_loop: bool = True):
    """Adsorption and desorption densities (nm^-3) at fugacities f."""
    lnf = np.log(f)
    gas, liq = _theta(lnf, 1e-12, TM), _theta(lnf, TP, 1 - 1e-12)
    ads = np.where(f < F_UP, gas, liq)
    des = np.where(f > F_DN, liq, gas)
    return N_M * ads, N_M * des


def beta_omega(theta):
    """beta Omega / V of the mean-field lattice gas (exact)."""
    return N_M * (np.log(1 - theta) + C * theta**2 / 2)


def grid(n_p: int = 15, p_lo: float = 30.0, p_hi: float = 3.0e4):
    p = np.geomspace(p_lo, p_hi, n_p)
    f = f_of_p(p)
    na, nd = branches(f)
    return p, f, na, nd


S = 1.0e-3  # nm^-3: the points' standard error in the synthetic tests


def solve(p, f, na, nd, anchor=None, s=S):
    err = np.full(p.size, s)
    if anchor is None:
        anchor = (float(beta_omega(nd[-1] / N_M)), 0.0)
    return eq.equilibrium_transition(f, p, na, err, nd, err, N_M * B, anchor)


def test_maxwell_construction_gives_the_symmetric_coexistence():
    # exact: particle-hole symmetry of the mean-field lattice gas puts ln(b f_eq) at -c/2
    t = np.linspace(1e-6, 1 - 1e-6, 400_001)
    got = eq.maxwell_equal_area(lnf_of_theta(t), N_M * t)
    assert got == pytest.approx(np.log(F_EQ), abs=1e-6)
    assert np.isnan(eq.maxwell_equal_area(np.log(t), t))  # no loop (c = 0)


@pytest.mark.parametrize("n_p", [15, 20])
def test_transition_matches_the_exact_coexistence(n_p):
    # exact limit (module docstring): f_eq = e^{-c/2}/b; p_eq = p(f_eq) of the bulk gas
    p, f, na, nd = grid(n_p)
    r = solve(p, f, na, nd)
    assert r.reason == "" and r.has_transition and not r.extrapolated
    tol = r.ln_f_integration_error + 4 * r.ln_f_stderr
    assert abs(np.log(r.fugacity_Pa / F_EQ)) <= tol
    assert abs(r.pressure_Pa - p_of_f(F_EQ)) <= r.pressure_uncertainty_Pa
    # the stated error is small enough for the checks below to mean something
    assert r.ln_f_integration_error < 5e-3
    # between the jumps: the exact spinodals, and the grid's own jumps
    assert F_DN < r.fugacity_Pa < F_UP
    loop = np.flatnonzero(np.abs(nd - na) > 4 * np.sqrt(2) * S)
    assert f[loop[0] - 1] < r.fugacity_Pa < f[loop[-1] + 1]
    # the branch: adsorption below f_eq, desorption above
    below = f < r.fugacity_Pa
    np.testing.assert_array_equal(r.density_per_nm3[below], na[below])
    np.testing.assert_array_equal(r.density_per_nm3[~below], nd[~below])
    # the gas branch's grand potential is the exact one (checks tail + integration) where
    # the transition uses it (below f_eq; next to the spinodal the branch is too steep for
    # the grid, which only the points beyond f_eq see)
    ok = np.isfinite(r.beta_omega_gas_per_nm3) & (f < r.fugacity_Pa)
    exact = beta_omega(na[ok] / N_M)
    np.testing.assert_allclose(r.beta_omega_gas_per_nm3[ok], exact, rtol=2e-3, atol=1e-4)


@pytest.mark.parametrize("n_p", [9, 10])
def test_a_loop_of_one_grid_point(n_p):
    # the loop covers one point: f_eq is extrapolated within one interval; exact limit as above
    p, f, na, nd = grid(n_p)
    r = solve(p, f, na, nd)
    assert r.has_transition and r.extrapolated
    assert abs(np.log(r.fugacity_Pa / F_EQ)) <= r.ln_f_integration_error + 4 * r.ln_f_stderr
    assert abs(r.pressure_Pa - p_of_f(F_EQ)) <= r.pressure_uncertainty_Pa
    assert F_DN < r.fugacity_Pa < F_UP
    assert r.ln_f_integration_error < 0.1  # honest but not unbounded


def test_a_wrong_construction_fails():
    # each perturbation of the construction moves f_eq by many times its stated uncertainty
    p, f, na, nd = grid(15, p_lo=1.0e3)
    good = solve(p, f, na, nd)
    unc = np.hypot(good.ln_f_stderr, good.ln_f_integration_error)
    assert abs(np.log(good.fugacity_Pa / F_EQ)) <= unc + 4 * good.ln_f_stderr
    # (a) integrating n d ln p instead of n d ln f
    wrong_p = solve(p, p, na, nd)
    assert abs(np.log(wrong_p.fugacity_Pa / F_EQ)) > 10 * unc
    # (b) dropping the dilute tail below the lowest point: the same as shifting the anchor
    tail = (N_M * B * f[0] + na[0]) / 2
    no_tail = solve(p, f, na, nd, anchor=(float(beta_omega(nd[-1] / N_M)) - tail, 0.0))
    assert abs(np.log(no_tail.fugacity_Pa / F_EQ)) > 3 * unc
    # (c) anchoring the liquid branch on the adsorption branch integrated through its jump:
    # its "transition" goes to the adsorption jump, not to the coexistence
    x = np.log(f)
    through_jump = -(tail + float(np.sum((na[1:] + na[:-1]) / 2 * np.diff(x))))
    brief = solve(p, f, na, nd, anchor=(through_jump, 0.0))
    assert through_jump > beta_omega(nd[-1] / N_M) + 1.0  # the jump loses free energy
    assert not brief.has_transition or np.log(brief.fugacity_Pa / F_EQ) > 10 * unc


def test_stderr_matches_the_scatter():
    # the propagated statistical error against the spread over seeded noisy replicas of the
    # points (common practice); 200 replicas: the sample std is within ~10 % (2 sigma)
    p, f, na, nd = grid(15)
    s = 0.02
    rng = np.random.default_rng(20261203)
    anchor = (float(beta_omega(nd[-1] / N_M)), 0.0)  # the exact state's, not the noisy point's
    ref = solve(p, f, na, nd, anchor, s=s)
    got = []
    for _ in range(200):
        ra = na + s * rng.standard_normal(p.size)
        rd = nd + s * rng.standard_normal(p.size)
        rd[f >= F_UP] = ra[f >= F_UP]  # one state above the loop: the branches coincide
        rd[f <= F_DN] = ra[f <= F_DN]
        got.append(np.log(solve(p, f, ra, rd, anchor, s=s).fugacity_Pa))
    assert np.std(got, ddof=1) == pytest.approx(ref.ln_f_stderr, rel=0.25)


def test_no_loop_gives_the_adsorption_branch():
    # c = 3 < 4 (mean-field critical value, exact): one continuous branch, run twice with noise
    c = 3.0
    t = np.linspace(1e-4, 1 - 1e-4, 20001)
    p = np.geomspace(30, 3e4, 15)
    f = f_of_p(p)
    lnf_t = np.log(t / (1 - t)) - c * t - np.log(B)
    n = N_M * np.interp(np.log(f), lnf_t, t)
    rng = np.random.default_rng(7)
    s = np.full(p.size, 0.01)
    na = n + s * rng.standard_normal(p.size)
    nd = n + s * rng.standard_normal(p.size)
    r = eq.equilibrium_transition(f, p, na, s, nd, s, N_M * B, None)
    assert r.reason == eq.NO_LOOP and not r.has_transition
    np.testing.assert_array_equal(r.density_per_nm3, na)
    np.testing.assert_allclose(r.density_per_nm3, nd, atol=5 * np.sqrt(2) * 0.01)
    # a point without an error does not make a loop
    s_nan = s.copy()
    s_nan[4] = np.nan
    nd_off = nd.copy()
    nd_off[4] += 1.0
    assert eq.equilibrium_transition(f, p, na, s, nd_off, s_nan, N_M * B).reason == eq.NO_LOOP
    assert eq.equilibrium_transition(f, p, na, s, nd_off, s, N_M * B).reason == eq.NO_ANCHOR
    # no desorption branch at all
    r2 = eq.equilibrium_transition(f, p, na, s, None, None, N_M * B, None)
    assert r2.reason == eq.NO_DESORPTION and np.all(np.isnan(r2.density_per_nm3))


def test_no_transition_with_a_reason():
    p, f, na, nd = grid(15)
    s = np.full(p.size, S)
    # a loop without a liquid-branch anchor
    r = eq.equilibrium_transition(f, p, na, s, nd, s, N_M * B, None)
    assert r.reason == eq.NO_ANCHOR and np.isnan(r.pressure_Pa)
    assert np.all(np.isnan(r.density_per_nm3))
    # the grid ends inside the loop: the branches differ at the top
    top = f < 0.5 * (F_EQ + F_UP)
    r = solve(p[top], f[top], na[top], nd[top], anchor=(0.0, 0.0))
    assert r.reason == eq.TOP_DISAGREE and not r.has_transition
    # the grid starts inside the loop
    bot = f > 0.5 * (F_EQ + F_DN)
    r = solve(p[bot], f[bot], na[bot], nd[bot])
    assert r.reason == eq.LOW_DISAGREE
    # a stray point far below the loop: no single loop, no transition
    stray = nd.copy()
    stray[2] += 10 * S
    r = solve(p, f, na, stray)
    assert r.reason == eq.SEPARATED and not r.has_transition
    with pytest.raises(InputError, match="n_ads"):
        eq.equilibrium_transition(f, p, na[:-1], s, nd, s, 1.0)


def test_pchip_is_monotone_and_integrates_cubics_exactly():
    # exact: a cubic Hermite interpolant with exact end slopes reproduces a cubic; here the
    # data are monotone and the interpolant must not overshoot (Fritsch & Carlson 1980)
    x = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    y = np.array([0.0, 0.1, 5.0, 5.1, 5.2])
    d = eq.pchip_slopes(x, y)
    xs = np.linspace(0, 4, 401)
    ys = np.array([eq.hermite_eval(x, y, d, v) for v in xs])
    assert np.all(np.diff(ys) >= -1e-12) and ys.max() <= 5.2 + 1e-12
    # the integral of the interpolant: compare with fine trapezoid of its own values
    fine = float(np.sum((ys[1:] + ys[:-1]) / 2 * np.diff(xs)))
    assert eq._hermite_cumulative(x, y, d, 4.0) == pytest.approx(fine, rel=1e-4)
    assert eq._hermite_cumulative(x, y, d, 2.5) == pytest.approx(
        float(np.sum(((ys[1:] + ys[:-1]) / 2 * np.diff(xs))[:250])), rel=1e-4
    )


def test_round_trip_through_the_kernel_file(tmp_path):
    # a kernel with a desorption branch: the transition from the file equals the one from
    # memory, and the one from the arrays directly
    d = small()
    p = np.asarray(d.pressures_Pa[0])
    n_p = p.size
    j = d.widths_w_nm.size - 1
    ads = {k: np.array(v, copy=True) for k, v in d.points["adsorption"].items()}
    des = {k: np.array(v, copy=True) for k, v in ads.items()}
    na, nd = branches(p)  # this kernel's bulk is ideal: f = p
    ads["density_per_nm3"][0, j] = na
    des["density_per_nm3"][0, j] = nd
    for b in (ads, des):
        b["density_per_nm3_stderr"][0, j] = S
        b["excess_density_per_nm3"][0, j] = b["density_per_nm3"][0, j]
    henry = np.array(d.henry_per_nm3_per_pa, copy=True)
    henry[0, j] = N_M * B
    d = dataclasses.replace(
        d,
        points={"adsorption": ads, "desorption": des},
        flags={"adsorption": d.flags["adsorption"], "desorption": d.flags["adsorption"].copy()},
        henry_per_nm3_per_pa=henry,
    )
    anchor = (float(beta_omega(nd[-1] / N_M)), 0.0)
    mem = eq.pore_transition(d, 0, j, anchor)
    back = open_kernel(write_kernel(d, tmp_path)).data
    got = eq.pore_transition(back, 0, j, anchor)
    assert mem.reason == "" and got.pressure_Pa == mem.pressure_Pa
    np.testing.assert_array_equal(got.density_per_nm3, mem.density_per_nm3)
    err = np.full(n_p, S)
    direct = eq.equilibrium_transition(p, p, na, err, nd, err, N_M * B, anchor)
    assert direct.pressure_Pa == mem.pressure_Pa
    assert abs(np.log(mem.fugacity_Pa / F_EQ)) <= mem.ln_f_integration_error + 4 * mem.ln_f_stderr
    # without an anchor: no transition, but the loop's bracket holds the exact one
    bare = eq.pore_transition(back, 0, j)
    assert bare.reason == eq.NO_ANCHOR
    lo, hi = bare.loop_pressure_range_Pa
    assert lo < F_EQ < hi and (lo, hi) == mem.loop_pressure_range_Pa
    # gcmc show names the loop and why there is no transition
    line = equilibrium_line(back)
    n_acc = int(np.count_nonzero(back.accessible))
    assert line.startswith(f"hysteresis loop in 1/{n_acc} accessible pores")
    assert f"bracketed by p {lo:.3g}-{hi:.3g} Pa" in line
    assert f"1 {eq.NO_ANCHOR}" in line
    assert equilibrium_line(small()) == ""  # no desorption branch: no line
    # a pore without a loop in the same file: the adsorption branch, with its reason
    other = eq.pore_transition(back, 0, 5)
    assert other.reason == eq.NO_LOOP
    with pytest.raises(InputError, match="pore index"):
        eq.pore_transition(back, 0, 999)


# the same lattice gas at other temperatures: c = eps/T, u = <U>/V = -(eps/2) n_m theta^2
T_K = 100.0
EPS_K = C * T_K


def _theta_at(beta, ln_lam):
    """theta of the mean-field lattice gas at (beta, ln lambda) on a path without a loop."""
    lo, hi = np.full_like(ln_lam, 1e-14), np.full_like(ln_lam, 1 - 1e-14)
    for _ in range(200):
        m = (lo + hi) / 2
        up = np.log(m / (1 - m)) - beta * EPS_K * m < ln_lam
        lo, hi = np.where(up, m, lo), np.where(up, hi, m)
    return (lo + hi) / 2


def test_a_reversible_path_gives_the_anchor_and_the_transition():
    # exact limit: a path from the dilute gas up a supercritical isotherm (c = 3 < 4), then at
    # ln lambda = 0 (above the loop at every temperature) down to T, then down the liquid
    # branch to the kernel's top point; d(beta omega) = u d beta - n d ln lambda; the anchor
    # must equal the exact beta omega there, and the transition from it the exact f_eq
    p, f, na, nd = grid(15)
    ln_top = float(np.log(B * f[-1]))  # ln lambda = ln(b f) at the kernel's temperature
    b_hi, b_lo = 1 / (2 * T_K), 1 / T_K
    leg1 = np.linspace(np.log(1e-3), 0.0, 24)
    leg2 = np.linspace(b_hi, b_lo, 8)[1:]
    leg3 = np.linspace(0.0, ln_top, 5)[1:]
    beta = np.concatenate([np.full(leg1.size, b_hi), leg2, np.full(leg3.size, b_lo)])
    ln_lam = np.concatenate([leg1, np.zeros(leg2.size), leg3])
    theta = _theta_at(beta, ln_lam)
    n = N_M * theta
    u = -(EPS_K / 2) * N_M * theta**2
    s = np.full(beta.size, S)
    path = eq.path_grand_potential(beta, ln_lam, n, u, N_M * np.exp(ln_lam[0]), s, 0 * s)
    exact = float(beta_omega(nd[-1] / N_M))
    assert abs(path.beta_omega_per_nm3 - exact) <= path.integration_error + 4 * path.stderr
    assert path.integration_error < 0.1  # the anchor is usable at this sampling
    r = solve(p, f, na, nd, anchor=path.anchor)
    assert r.has_transition
    assert abs(np.log(r.fugacity_Pa / F_EQ)) <= r.ln_f_integration_error + 4 * r.ln_f_stderr
    assert F_DN < r.fugacity_Pa < F_UP
    # a path that ignores the energy term (integrating -n d ln z only) is wrong
    wrong = eq.path_grand_potential(beta, ln_lam, n, 0 * u, N_M * np.exp(ln_lam[0]))
    assert abs(wrong.beta_omega_per_nm3 - exact) > 20 * path.anchor[1]
    with pytest.raises(InputError, match="path"):
        eq.path_grand_potential(beta[:2], ln_lam[:2], n[:2], u[:2], 0.0)


# --- the path's reversibility check: changes against the fluctuations at both ends ---------
def _lattice_path():
    """The reversible path of the test above with the mean-field lattice gas's exact
    fluctuations (per volume): with g = d theta/d ln lambda = theta (1 - theta) /
    (1 - beta eps theta (1 - theta)), var N / V = n_m g, cov(N, U/k) / V = -eps n_m theta g
    and var(U/k) / V = eps^2 n_m theta^2 g (the derivatives of n and u = -(eps/2) n_m theta^2
    in ln lambda and beta: exact)."""
    b_hi, b_lo = 1 / (2 * T_K), 1 / T_K
    leg1 = np.linspace(np.log(1e-3), 0.0, 24)
    leg2 = np.linspace(b_hi, b_lo, 8)[1:]
    leg3 = np.linspace(0.0, -1.0, 5)[1:]
    beta = np.concatenate([np.full(leg1.size, b_hi), leg2, np.full(leg3.size, b_lo)])
    ln_lam = np.concatenate([leg1, np.zeros(leg2.size), leg3])
    theta = _theta_at(beta, ln_lam)
    g = theta * (1 - theta) / (1 - beta * EPS_K * theta * (1 - theta))
    n = N_M * theta
    u = -(EPS_K / 2) * N_M * theta**2
    fl = (N_M * g, -EPS_K * N_M * theta * g, EPS_K**2 * N_M * theta**2 * g)
    return beta, ln_lam, n, u, fl


def _ratios(beta, ln_lam, n, u, fl, err=0.0):
    e = np.full(beta.size, err)
    return eq.path_jumps(beta, ln_lam, n, e, u, e, *fl)


def test_a_reversible_path_has_no_jump():
    # exact limit: without noise, the change over each interval is the mean of the exact
    # derivative inside, which lies within the end values unless the derivative peaks
    # inside; this path's derivatives vary slowly from state to state (ratios about 1)
    beta, ln_lam, n, u, fl = _lattice_path()
    r = _ratios(beta, ln_lam, n, u, fl)
    assert r.shape == (beta.size - 1, 2) and np.all(np.isfinite(r))
    assert np.max(r) < 1.0, np.max(r)  # 0.88 (n), 0.94 (u)
    assert eq.worst_path_jump(r) is None
    # the wrong derivative of u along the beta leg (cov(N, U) for var U, a factor eps/theta
    # off) reads the same path as a jump: the check can fail
    wrong = (fl[0], fl[1], -fl[1])
    assert eq.worst_path_jump(_ratios(beta, ln_lam, n, u, wrong)) is not None


def test_a_path_that_freezes_is_not_reversible():
    # the path switches to a denser, much lower-energy state with small fluctuations (a
    # pore liquid freezing) in the middle of the cooling leg: the jump is found there, and
    # the stored reason says which states it lies between
    beta, ln_lam, n, u, fl = _lattice_path()
    k = 27  # the fourth state of the cooling leg
    n2, u2 = n.copy(), u.copy()
    n2[k:] *= 1.05
    u2[k:] *= 1.25
    fl2 = tuple(np.where(np.arange(beta.size) >= k, 0.2 * a, a) for a in fl)
    jump = eq.worst_path_jump(_ratios(beta, ln_lam, n2, u2, fl2))
    assert jump is not None and jump.index == k - 1 and jump.quantity == "energy"
    text = eq.describe_path_jump(jump, 1 / beta, ln_lam)
    assert text.startswith(eq.PATH_JUMP) and f"states {k - 1} and {k}" in text
    # the same change within 4 combined standard errors is noise, not a jump
    big = float(np.max(np.abs(np.diff(u2)))) / 4
    assert eq.worst_path_jump(_ratios(beta, ln_lam, n2, u2, fl2, err=big)) is None
    # a state without its fluctuations is not judged
    nan = tuple(np.full(beta.size, np.nan) for _ in fl)
    assert eq.worst_path_jump(_ratios(beta, ln_lam, n2, u2, nan)) is None
