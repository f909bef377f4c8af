"""Tests of the correlating forms (gcmc.kernel.forms) and the isotherm fitter (gcmc.pipeline.fits).

All isotherm data here are invented synthetic data drawn from the forms themselves with
seeded Gaussian noise; the statistical tolerances are derived beside each check.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator
from scipy.special import lambertw

from gcmc.errors import InputError
from gcmc.kernel import forms
from gcmc.pipeline import fits

# Invented "true" parameters for each form on a pressure grid 1e2..1e7 Pa (30 points, log
# spaced). Amounts in molecules/nm^3, affinities in 1/Pa.
GRID = np.logspace(2.0, 7.0, 30)
TRUE = {
    "langmuir": [8.0, 1e-4],
    "sips": [8.0, 1e-4, 0.7],
    "toth": [8.0, 1e-4, 0.6],
    "hill_de_boer": [8.0, 1e-4, 4.0],
    "dual_site_langmuir_sips": [3.0, 1e-3, 6.0, 1e-5, 0.3],
    "multi_step_2": [3.0, 1e-3, 6.0, 1e-5, 3.0],
    "multi_step_3": [2.0, 1e-3, 3.0, 3e-5, 4.0, 3.0, 1e-6, 8.0],
}
REL_NOISE = 0.01  # 1 % standard error, typical of a converged GCMC point (common practice)


def _synthetic(name: str, rng: np.random.Generator, p: np.ndarray = GRID):
    n0 = forms.FORMS[name].evaluate(np.array(TRUE[name], dtype=float), p)
    s = REL_NOISE * n0
    return n0, n0 + s * rng.standard_normal(p.size), s


# --------------------------------------------------------------------------------------------
# forms: exact identities and limits
# --------------------------------------------------------------------------------------------
def test_registry_contents_and_references():
    for name in TRUE:
        f = forms.FORMS[name]
        assert f.reference and f.equation
        assert len(f.parameter_names) == len(TRUE[name]) == len(f.kinds)
        out = f.evaluate(np.array(TRUE[name]), GRID.reshape(5, 6))
        assert out.shape == (5, 6) and np.all(np.isfinite(out)) and np.all(out > 0)


def test_special_cases_reduce_to_langmuir():
    # Exact identities from the definitions: Sips s = 1, Toth t = 1 and a multi-step form whose
    # second step has m = 1 and the same b are all Langmuir (amounts add).
    p = np.logspace(-2, 9, 45)
    lang = forms.FORMS["langmuir"].evaluate(np.array([5.0, 3e-4]), p)
    sips = forms.FORMS["sips"].evaluate(np.array([5.0, 3e-4, 1.0]), p)
    toth = forms.FORMS["toth"].evaluate(np.array([5.0, 3e-4, 1.0]), p)
    ms2 = forms.FORMS["multi_step_2"].evaluate(np.array([2.0, 3e-4, 3.0, 3e-4, 1.0]), p)
    for other in (sips, toth, ms2):
        np.testing.assert_allclose(other, lang, rtol=1e-13)  # rounding only


@pytest.mark.parametrize(
    "name", ["langmuir", "toth", "hill_de_boer", "multi_step_2", "multi_step_3"]
)
def test_forms_obey_their_henry_law(name):
    # Exact limit: n/p -> K_H as p -> 0. At b p = 1e-14 the leading relative corrections are
    # b p (Langmuir), (b p)^t / t = 7e-9 for Toth with t = 0.6, (2 - c) b p (Hill-de Boer) and
    # (b_k p)^m_k with m_k >= 1 (multi-step), all below the tolerance 1e-7.
    f = forms.FORMS[name]
    par = np.array(TRUE[name])
    k_h = f.henry_constant(par)
    p = 1e-14 / np.max(par[1::3] if name.startswith("multi") else par[1:2])
    np.testing.assert_allclose(f.evaluate(par, np.array([p]))[0] / p, k_h, rtol=1e-7)
    assert f.evaluate(par, np.array([0.0]))[0] == 0.0


@pytest.mark.parametrize("name", list(TRUE))
def test_gradients_match_finite_differences(name):
    # Central differences with relative step 1e-6: truncation error O(1e-12) relative and
    # rounding O(eps/1e-6 * max|n|) ~ 1e-10 * max|n|/param; tolerance 1e-6 of each column's
    # scale covers both with margin.
    f = forms.FORMS[name]
    par = np.array(TRUE[name])
    p = np.concatenate([[0.0], np.logspace(0, 9, 28)])
    g = f.gradient(par, p)
    assert g.shape == (p.size, par.size) and np.all(np.isfinite(g))
    for j in range(par.size):
        h = 1e-6 * par[j]
        up, dn = par.copy(), par.copy()
        up[j] += h
        dn[j] -= h
        fd = (f.evaluate(up, p) - f.evaluate(dn, p)) / (2 * h)
        scale = np.max(np.abs(fd)) + 1e-300
        assert np.max(np.abs(g[:, j] - fd)) < 1e-6 * scale, (name, f.parameter_names[j])


# --------------------------------------------------------------------------------------------
# Hill-de Boer implicit solve
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("c", [0.0, 1.0, 4.0, 6.5, 27.0 / 4.0])
def test_hill_de_boer_solves_its_defining_equation(c):
    # Defining equation (Hill 1946; de Boer 1953): b p = x exp(x - c theta), x = theta/(1-theta).
    # Checked in log form, ln x + x - c theta = ln(b p), to 1e-10 (the brief; the solver
    # reaches ~1e-13), over 16 decades of b p, including the critical c = 27/4.
    bp = np.logspace(-8, 8, 161)
    th = forms.hill_de_boer_coverage(bp, c)
    assert np.all((th > 0) & (th < 1))
    x = th / (1 - th)
    np.testing.assert_allclose(np.log(x) + x - c * th, np.log(bp), rtol=0, atol=1e-10)
    assert np.all(np.diff(th) > 0)  # single-valued, increasing branch for c <= 27/4


def test_hill_de_boer_volmer_limit_is_lambert_w():
    # c = 0 is the Volmer equation b p = x e^x, whose exact solution is x = W(b p)
    # (Lambert W), theta = W/(1 + W). Agreement to 1e-12 in theta (the solver's target).
    bp = np.logspace(-10, 10, 101)
    w = lambertw(bp).real
    np.testing.assert_allclose(
        forms.hill_de_boer_coverage(bp, 0.0), w / (1 + w), rtol=0, atol=1e-12
    )


def test_hill_de_boer_limits_and_refusal():
    # theta(0) = 0, theta(inf) = 1 (exact limits); c > 27/4 has a van der Waals loop: refused.
    th = forms.hill_de_boer_coverage(np.array([0.0, np.inf]), 3.0)
    assert th[0] == 0.0 and th[1] == 1.0
    with pytest.raises(InputError, match="c"):
        forms.hill_de_boer_coverage(np.array([1.0]), 7.0)
    with pytest.raises(InputError, match="hill_de_boer c"):
        forms.FORMS["hill_de_boer"].check_parameters([8.0, 1e-4, 7.0])


# --------------------------------------------------------------------------------------------
# parameter recovery: pulls over seeded replicates
# --------------------------------------------------------------------------------------------
N_REPLICATES = 50
# Under correct weighted least squares with the stated covariance, each pull
# (theta_hat - theta_true)/sigma is ~N(0, 1) to first order in the noise. Over 50 replicates:
#  - the mean pull has standard error 1/sqrt(50) = 0.141; allow 4 of them, 0.57;
#  - the sample std has standard error ~1/sqrt(2*49) = 0.101 (~10 %); allow 4 of them, 0.40.
# About 30 parameters are checked, so 4-sigma bounds keep the family-wise false-alarm rate
# at ~1 %; the price is power: a parameter sigma wrong by more than a factor ~1.7 (pull std
# < 0.6 or > 1.4) or a bias above ~0.6 sigma is detected, smaller errors may not be.
MEAN_TOL = 4.0 / np.sqrt(N_REPLICATES)
STD_TOL = 4.0 / np.sqrt(2.0 * (N_REPLICATES - 1))


@pytest.mark.parametrize("name", list(TRUE))
def test_parameter_pulls_and_reduced_chi2(name):
    rng = np.random.default_rng([20240611, list(TRUE).index(name)])
    truth = np.array(TRUE[name])
    pulls, red = [], []
    for _ in range(N_REPLICATES):
        _, n, s = _synthetic(name, rng)
        r = fits.fit_form(name, GRID, n, s)
        assert r.form == name and np.all(np.isfinite(r.covariance))
        pulls.append((r.parameters - truth) / r.stderr)
        red.append(r.reduced_chi2)
    pulls = np.array(pulls)
    mean, std = pulls.mean(axis=0), pulls.std(axis=0, ddof=1)
    assert np.all(np.abs(mean) < MEAN_TOL), (name, mean)
    assert np.all(np.abs(std - 1.0) < STD_TOL), (name, std)
    # chi2/dof has mean 1 and variance 2/dof; the mean of 50 has sd sqrt(2/(dof*50)); 4 sd.
    dof = GRID.size - truth.size
    assert abs(np.mean(red) - 1.0) < 4.0 * np.sqrt(2.0 / (dof * N_REPLICATES)), np.mean(red)


def test_covariance_is_unscaled_inverse_fisher_matrix():
    # Linear check: for Langmuir with b fixed the model is linear in n_m, so the unscaled
    # covariance of n_m is exactly 1/sum((dn/dn_m)^2/sigma^2) (weighted least squares).
    # Here the 2x2 covariance must equal inv(J^T J) built from the analytic gradient.
    rng = np.random.default_rng(5)
    _, n, s = _synthetic("langmuir", rng)
    r = fits.fit_form("langmuir", GRID, n, s)
    g = forms.FORMS["langmuir"].gradient(r.parameters, GRID) / s[:, None]
    np.testing.assert_allclose(r.covariance, np.linalg.inv(g.T @ g), rtol=1e-8)
    np.testing.assert_allclose(
        r.residuals, (n - forms.FORMS["langmuir"].evaluate(r.parameters, GRID)) / s, rtol=1e-12
    )


# --------------------------------------------------------------------------------------------
# model selection
# --------------------------------------------------------------------------------------------
def test_selection_prefers_langmuir_for_langmuir_data():
    # AICc (Hurvich & Tsai 1989) prefers a nested model with one extra parameter only when
    # chi2 drops by more than 2 + 2*3*4/26 - 2*2*3/27 = 2.48; for Langmuir data that drop is
    # chi2_1-distributed, so each one-extra-parameter alternative (Sips, Toth) wins with
    # probability P(chi2_1 > 2.48) = 0.115; Langmuir should win in ~75-85 % of replicates.
    # Require >= 7 of 12: for a true rate 0.75, P(X <= 6) = 5 %; a selector with no
    # preference among the 6 candidates would give ~2 of 12. Langmuir must also always pass
    # the goodness-of-fit test (false-rejection rate 1e-3 per replicate).
    rng = np.random.default_rng(99)
    chosen = []
    for _ in range(12):
        _, n, s = _synthetic("langmuir", rng)
        r = fits.fit_isotherm(GRID, n, s)
        assert r.accepted
        cand = {c[0]: c for c in r.candidates}
        assert cand["langmuir"][3], cand["langmuir"]
        chosen.append(r.form)
    assert chosen.count("langmuir") >= 7, chosen


def test_selection_picks_two_step_form_for_two_step_data():
    # Invented two-step isotherm (Langmuir monolayer + sharp filling step, m = 3). Every
    # one-step form must fail the chi2 test (their misfit is hundreds of sigma) and the
    # winner must be a two-step form; multi_step_3 can win only if chi2 drops by > ~8
    # (3 extra parameters), P(chi2_3 > 8) ~ 5 %, so require >= 4 of 6 replicates
    # (P(X <= 3) ~ 2e-4). The winner's parameters must lie within 5 sigma of the truth.
    rng = np.random.default_rng(7)
    truth = np.array(TRUE["multi_step_2"])
    winners = []
    for _ in range(6):
        _, n, s = _synthetic("multi_step_2", rng)
        r = fits.fit_isotherm(GRID, n, s)
        cand = {c[0]: c for c in r.candidates}
        for one_step in ("langmuir", "sips", "toth", "hill_de_boer"):
            assert not cand[one_step][3], cand[one_step]
        winners.append(r.form)
        if r.form == "multi_step_2":
            assert np.all(np.abs(r.parameters - truth) < 5 * r.stderr)
    assert winners.count("multi_step_2") >= 4, winners


def _staircase(p: np.ndarray) -> np.ndarray:
    # invented layering isotherm: a Langmuir rise and three sharp steps (four steps in all)
    out = forms.FORMS["langmuir"].evaluate(np.array([1.0, 1e-2]), p)
    for b in (1e-3, 1e-4, 1e-5):
        out = out + 2.0 * (b * p) ** 15 / (1 + (b * p) ** 15)
    return out


def test_sharp_steps_no_form_follows_fall_back_to_flagged_interpolant():
    rng = np.random.default_rng(11)
    p = np.logspace(1, 7, 40)
    n0 = _staircase(p)
    s = 0.005 * n0
    n = n0 + s * rng.standard_normal(p.size)
    r = fits.fit_isotherm(p, n, s)
    assert r.form == "monotone_interpolant" and not r.accepted
    assert all(not c[3] for c in r.candidates) and len(r.candidates) == len(fits.DEFAULT_FORMS)
    # the knots are the weighted isotonic projection of the data (absolute loading is
    # non-decreasing in mu: d<N>/d(beta mu) = var N >= 0, exact)
    iso, _ = fits.isotonic_regression(n, 1 / s**2)
    np.testing.assert_allclose(fits.evaluate(r, p), iso, rtol=1e-12)
    dense = fits.evaluate(r, np.logspace(1, 7, 4001))
    assert np.all(np.diff(dense) >= -1e-12 * dense.max())
    assert np.all(np.abs(fits.evaluate(r, p) - n0) < 5 * s)  # follows the steps within 5 sigma


def test_isotonic_regression_is_the_weighted_monotone_least_squares_fit():
    # Pool-adjacent-violators (Ayer et al. 1955): two violators pool to their weighted mean;
    # monotone input is returned unchanged.
    fitted, blocks = fits.isotonic_regression(
        np.array([1.0, 3.0, 2.0, 4.0]), np.array([1, 1, 3, 1])
    )
    np.testing.assert_allclose(fitted, [1.0, 2.25, 2.25, 4.0])
    assert list(blocks) == [0, 1, 1, 2]
    y = np.cumsum(np.random.default_rng(0).random(20))
    np.testing.assert_array_equal(fits.isotonic_regression(y, np.ones(20))[0], y)


def test_zero_isotherm_gives_zero_form():
    # A pore too narrow for the probe: zero loading at every pressure (conventions), stderr 0.
    p = np.logspace(2, 6, 10)
    r = fits.fit_isotherm(p, np.zeros(10), np.zeros(10))
    assert r.form == "zero" and r.accepted and r.parameters.size == 0
    np.testing.assert_array_equal(fits.evaluate(r, np.array([0.0, 1e3, 1e9])), 0.0)
    with pytest.raises(InputError, match="zero"):
        fits.fit_form("langmuir", p, np.zeros(10), np.zeros(10))


def test_missing_and_zero_stderr_are_floored_by_the_documented_rule():
    n = np.array([0.0, 0.5, 1.0, 2.0, 4.0])
    s = np.array([0.0, 0.01, np.nan, 0.04, 0.0])
    eff = fits.effective_stderr(n, s)
    # missing -> median relative error (0.02) * |n|, but at least the smallest valid error
    # (0.01); then floor max(1e-3 |n|, 1e-6 max n)
    np.testing.assert_allclose(eff, [0.01, 0.01, 0.02, 0.04, 0.08])
    # tiny reported errors are raised to 0.1 % of n
    np.testing.assert_allclose(fits.effective_stderr(n, np.full(5, 1e-9))[1:], 1e-3 * n[1:])
    # and a fit with such errors runs and gives finite results
    rng = np.random.default_rng(2)
    n0, nn, ss = _synthetic("langmuir", rng)
    ss[[0, 5]] = [0.0, np.inf]
    r = fits.fit_form("langmuir", GRID, nn, ss)
    assert np.all(np.isfinite(r.parameters)) and np.all(np.isfinite(r.covariance))


# --------------------------------------------------------------------------------------------
# monotone interpolant
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", ["random", "monotone", "flat_run", "two_points"])
def test_pchip_matches_scipy(kind):
    # Same scheme as scipy.interpolate.PchipInterpolator (Fritsch & Carlson 1980 conditions,
    # Fritsch-Butland slopes): agreement to 1e-12 (differences are rounding, ~1e-15).
    rng = np.random.default_rng(["random", "monotone", "flat_run", "two_points"].index(kind))
    x = np.sort(rng.uniform(-5, 12, 15))
    y = rng.normal(size=15)
    if kind == "monotone":
        y = np.cumsum(np.abs(y))
    elif kind == "flat_run":
        y = np.cumsum(np.abs(y))
        y[4:8] = y[4]
    elif kind == "two_points":
        x, y = x[:2], y[:2]
    ref = PchipInterpolator(x, y)
    d = forms.pchip_slopes(x, y)
    np.testing.assert_allclose(d, ref.derivative()(x), rtol=0, atol=1e-12 * np.abs(d).max())
    xq = np.concatenate([np.linspace(x[0], x[-1], 2001), x])
    np.testing.assert_allclose(forms.pchip_evaluate(x, y, d, xq), ref(xq), rtol=0, atol=1e-12)
    np.testing.assert_allclose(forms.monotone_interpolant(x, y)(xq), ref(xq), rtol=0, atol=1e-12)
    assert np.isnan(forms.pchip_evaluate(x, y, d, np.array([x[0] - 1, x[-1] + 1]))).all()


def test_pchip_preserves_monotonicity_without_overshoot():
    # Fritsch & Carlson (1980): with these slopes the interpolant is monotone on every
    # interval where the data are, and stays within [y_i, y_{i+1}] (no overshoot), including
    # next to a near-vertical step, where an unconstrained cubic spline overshoots.
    x = np.log(np.logspace(1, 7, 25))
    y = np.where(x < np.log(1e4), 0.1 * np.exp(x - x[0]) / 1e3, 5.0)
    y = np.maximum.accumulate(y + np.linspace(0, 0.5, 25))
    d = forms.pchip_slopes(x, y)
    for i in range(x.size - 1):
        t = np.linspace(x[i], x[i + 1], 201)
        v = forms.pchip_evaluate(x, y, d, t)
        assert np.all(np.diff(v) >= -1e-13)
        assert v.min() >= y[i] - 1e-13 and v.max() <= y[i + 1] + 1e-13


def test_interpolant_pack_round_trip():
    p = np.logspace(1, 5, 9)
    n = np.linspace(0.1, 3.0, 9) ** 2
    x, y, d = forms.unpack_interpolant(forms.pack_interpolant(p, n))
    np.testing.assert_allclose(np.exp(x), p, rtol=1e-15)
    np.testing.assert_array_equal(y, n)
    np.testing.assert_allclose(
        d, PchipInterpolator(np.log(p), n).derivative()(np.log(p)), atol=1e-12
    )
    with pytest.raises(InputError, match="parameters"):
        forms.unpack_interpolant(np.ones(7))


# --------------------------------------------------------------------------------------------
# low- and high-pressure policies
# --------------------------------------------------------------------------------------------
def test_henry_extension_is_continuous_and_has_the_exact_henry_limit():
    k_h, p_low, n_low = 2.0e-4, 50.0, 9.0e-3  # K_H p_low = 1e-2: the point is 10 % below it
    n_at = forms.henry_extension(np.array([p_low]), p_low, n_low, k_h)[0]
    assert abs(n_at / n_low - 1) < 1e-14  # continuity at p_low (rounding only)
    # n/(K_H p) = exp(c p) exactly, c = ln(n_low/(K_H p_low))/p_low; -> 1 as p -> 0
    c = np.log(n_low / (k_h * p_low)) / p_low
    p = p_low * np.logspace(-12, 0, 25)
    ratio = forms.henry_extension(p, p_low, n_low, k_h) / (k_h * p)
    np.testing.assert_allclose(ratio, np.exp(c * p), rtol=1e-14)
    assert abs(ratio[0] - 1) < 2 * abs(c) * p[0]  # |exp(cp) - 1| <= |c| p (1 + small)
    assert forms.henry_extension(np.array([0.0]), p_low, n_low, k_h)[0] == 0.0
    np.testing.assert_array_equal(forms.henry_extension(p, p_low, 0.0, 0.0), 0.0)
    with pytest.raises(InputError, match="henry_constant"):
        forms.henry_extension(p, p_low, n_low, -1.0)


def test_evaluate_policies_above_and_below_the_simulated_range():
    rng = np.random.default_rng(4)
    _, n, s = _synthetic("langmuir", rng)
    r = fits.fit_form("langmuir", GRID, n, s)
    p_lo, p_hi = r.p_range
    n_hi = fits.evaluate(r, np.array([p_hi]))[0]
    assert np.all(fits.evaluate(r, np.array([2 * p_hi, 1e12])) == n_hi)  # clamp
    assert np.isnan(fits.evaluate(r, np.array([2 * p_hi]), above="refuse")).all()
    assert np.isnan(fits.evaluate(r, np.array([0.5 * p_lo]), below="refuse")).all()
    inside = GRID[3:-3]
    np.testing.assert_allclose(
        fits.evaluate(r, inside), forms.FORMS["langmuir"].evaluate(r.parameters, inside)
    )
    # Henry policy: continuous at p_low and exactly K_H p as p -> 0
    k_h = 1.1 * forms.FORMS["langmuir"].henry_constant(r.parameters)
    lowp = np.array([1e-9 * p_lo, p_lo * (1 - 1e-12), p_lo])
    v = fits.evaluate(r, lowp, below="henry", henry_constant=k_h)
    assert abs(v[1] / v[2] - 1) < 1e-9
    assert abs(v[0] / (k_h * lowp[0]) - 1) < 1e-9
    with pytest.raises(InputError, match="henry_constant"):
        fits.evaluate(r, lowp, below="henry")
    with pytest.raises(InputError, match="above"):
        fits.evaluate(r, lowp, above="extrapolate")


def test_interpolant_below_range_is_a_line_through_the_origin():
    p = np.logspace(2, 4, 6)
    n = np.array([0.1, 0.3, 0.9, 2.0, 2.1, 2.2])
    par = forms.pack_interpolant(p, n)
    v = forms.evaluate_fit("monotone_interpolant", par, np.array([0.0, 50.0, 100.0, 1e6]))
    np.testing.assert_allclose(v, [0.0, 0.05, 0.1, 2.2])


def test_bad_input_names_the_field():
    p = np.logspace(2, 6, 10)
    n = np.linspace(0.1, 1.0, 10)
    s = np.full(10, 0.01)
    with pytest.raises(InputError, match="^p:"):
        fits.fit_isotherm(p[::-1], n, s)
    with pytest.raises(InputError, match="^n:"):
        fits.fit_isotherm(p, -n, s)
    with pytest.raises(InputError, match="^stderr:"):
        fits.fit_isotherm(p, n, s[:5])
    with pytest.raises(InputError, match="^form:"):
        fits.fit_form("freundlich", p, n, s)
    with pytest.raises(InputError, match="^criterion:"):
        fits.fit_isotherm(p, n, s, criterion="r2")
    with pytest.raises(InputError, match="^parameters:"):
        forms.evaluate_fit("langmuir", [1.0], p)
