"""Tests of gcmc.sampling.statistics on synthetic processes with exactly known statistics.

Most references are exact results for the stationary AR(1) process x_t = phi x_{t-1} + e_t,
with e_t ~ N(0, s^2) (e.g. Box & Jenkins, "Time Series Analysis"; the identities follow from
the autocorrelation C_t = phi^t):

- var(x) = s^2/(1 - phi^2);
- statistical inefficiency g = 1 + 2 sum_t phi^t = (1 + phi)/(1 - phi);
- var(mean of n samples) = var(x)/n * [1 + 2 sum_{t=1}^{n-1} (1 - t/n) phi^t], exact for
  finite n.

The AR(1) series are started from the stationary distribution, so they have no transient.
All seeds are fixed, so the tests are deterministic. Tolerances come from the estimators'
own sampling errors, as stated beside each check.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import lfilter
from scipy.stats import chi2

from gcmc.errors import InputError
from gcmc.sampling.statistics import (
    _chi2_quantile_99,
    agreement,
    block_average,
    detect_equilibration,
    drift_test,
    fluctuation_ratio,
    statistical_inefficiency,
)


def ar1(phi: float, n: int, seed: int, sigma_x: float = 1.0) -> np.ndarray:
    """Stationary AR(1) series with marginal standard deviation sigma_x."""
    rng = np.random.default_rng(seed)
    s = sigma_x * math.sqrt(1.0 - phi**2)
    e = rng.normal(0.0, s, n)
    x_prev = rng.normal(0.0, sigma_x)  # stationary initial state
    return lfilter([1.0], [1.0, -phi], e, zi=[phi * x_prev])[0]


def ar1_exact_stderr(phi: float, n: int, sigma_x: float = 1.0) -> float:
    """Exact standard error of the mean of n samples of a stationary AR(1) process."""
    t = np.arange(1, n, dtype=np.float64)
    return math.sqrt(sigma_x**2 / n * (1.0 + 2.0 * np.sum((1.0 - t / n) * phi**t)))


def test_chi2_quantile_approximation_matches_scipy():
    # Reference: scipy.stats.chi2.ppf (exact quantile). The Wilson-Hilferty approximation
    # used for the plateau test is within 1 % for every df (6.59 vs 6.63 at df = 1).
    df = np.arange(1, 41)
    assert np.allclose(_chi2_quantile_99(df), chi2.ppf(0.99, df), rtol=0.01)


@pytest.mark.parametrize("phi", [0.5, 0.9])
def test_ar1_statistical_inefficiency_matches_exact(phi):
    # Exact: g = (1 + phi)/(1 - phi) for AR(1) (3 and 19 here).
    # Tolerance: the windowed sum has relative standard deviation sqrt(2(2M + 1)/T) (Madras &
    # Sokal, J. Stat. Phys. 50 (1988) 109, from memory). The window M is where C_t first
    # drops into its noise, about 50 lags for phi = 0.9 at T = 2^19, so that is 2 %. The
    # data-dependent window widens it a little and skews it upwards: 2.2 % standard deviation
    # and +0.5 % mean were observed over 60 seeds in development. So 15 % is > 6 sigma.
    g_exact = (1.0 + phi) / (1.0 - phi)
    for seed in (1, 2, 3):
        g = statistical_inefficiency(ar1(phi, 2**19, seed))
        assert abs(g / g_exact - 1.0) < 0.15, (seed, g, g_exact)


@pytest.mark.parametrize("phi", [0.5, 0.9])
def test_ar1_block_average_matches_exact_variance_of_mean(phi):
    # Exact: the finite-n variance of the mean of AR(1) (module docstring).
    # Tolerance: 4 sigma of the estimate's own error, stderr/sqrt(2(n'-1)) (Flyvbjerg &
    # Petersen 1989). A residual low bias from blocks that are too short would show up here.
    n = 2**17
    exact = ar1_exact_stderr(phi, n)
    g_exact = n * exact**2  # var(x) = 1
    for seed in (11, 12, 13):
        est = block_average(ar1(phi, n, seed))
        assert est.reliable, est.reason
        assert est.n_samples == n
        assert abs(est.stderr - exact) <= 4.0 * est.stderr_uncertainty, (seed, est, exact)
        # g = n stderr^2/var, so its relative error is twice that of stderr. The sample
        # variance adds sqrt(2g/n) < 2 %, hence the 0.02.
        rel_unc = 2.0 * est.stderr_uncertainty / est.stderr + 0.02
        assert abs(est.inefficiency / g_exact - 1.0) <= 4.0 * rel_unc
        assert est.n_effective == pytest.approx(n / est.inefficiency)


def test_block_average_has_no_systematic_low_bias():
    # Reading the error at a level whose residual block correlation is merely undetectable
    # gives errors biased low by ~2 of their own sigmas. That happened in development when
    # the error was read at the first level passing the test. Over 100 independent AR(1)
    # series, z = (stderr - exact)/stderr_uncertainty should have a mean near 0: within
    # 1/sqrt(100) = 0.1, plus about -0.3 from the skewed distribution of a square-root
    # variance and the remaining 1/block-length bias. A mean below -1 means systematic
    # underestimation.
    n, phi = 2**14, 0.9
    exact = ar1_exact_stderr(phi, n)
    z = []
    for seed in range(100):
        est = block_average(ar1(phi, n, 3000 + seed))
        z.append((est.stderr - exact) / est.stderr_uncertainty)
    assert -1.0 < float(np.mean(z)) < 1.0, np.mean(z)


def test_block_average_error_bars_have_nominal_coverage():
    # The true mean of the AR(1) series is 0. If the error bars are right, z = mean/stderr is
    # close to standard normal. Its rms over 100 independent series should then be 1, within
    # ~0.07 (1/sqrt(200)), plus a little for the noise in stderr itself. The window
    # [0.75, 1.3] is > 3.5 sigma. Error bars 30 % too small would fail it.
    z = []
    for seed in range(100):
        est = block_average(ar1(0.9, 2**14, 1000 + seed))
        assert est.reliable, est.reason
        z.append(est.mean / est.stderr)
    rms = float(np.sqrt(np.mean(np.square(z))))
    assert 0.75 < rms < 1.3, rms


def test_white_noise():
    # Exact: for independent samples, g = 1 and stderr = sigma/sqrt(n).
    n, sigma = 2**16, 2.5
    x = np.random.default_rng(5).normal(10.0, sigma, n)
    est = block_average(x)
    assert est.reliable, est.reason
    # 4 sigma of the error estimate's own uncertainty (Flyvbjerg & Petersen 1989).
    assert abs(est.stderr - sigma / math.sqrt(n)) <= 4.0 * est.stderr_uncertainty
    assert abs(est.inefficiency - 1.0) <= 4.0 * 2.0 * est.stderr_uncertainty / est.stderr + 0.02
    # The windowed sum keeps only the leading run of positive C_t. Each is ~|N(0, 1/T)| and
    # the run length is geometric with mean 1, so g - 1 ~ 1.6/sqrt(T). Going above
    # 12/sqrt(T) (here 0.047) has probability < 1 %.
    g = statistical_inefficiency(x)
    assert 1.0 <= g < 1.0 + 12.0 / math.sqrt(n), g


def test_constant_series_is_flagged():
    # A frozen run: the mean is exact, but the error cannot be estimated from the data.
    x = np.full(5000, 3.7)
    est = block_average(x)
    assert not est.reliable
    assert "no fluctuations" in est.reason
    assert est.mean == 3.7
    assert est.stderr == 0.0
    assert math.isnan(statistical_inefficiency(x))
    assert detect_equilibration(x) == (0, pytest.approx(math.nan, nan_ok=True), 0.0)
    drift = drift_test(x)
    assert not drift.passed
    assert math.isnan(fluctuation_ratio(np.linspace(0, 1, x.size), x)[0])


def test_too_short_series_is_flagged():
    x = np.random.default_rng(3).normal(size=20)
    est = block_average(x, min_blocks=16)
    assert not est.reliable
    assert "too short" in est.reason
    one = block_average(np.array([1.0]))
    assert not one.reliable and "too short" in one.reason and one.mean == 1.0


def test_no_plateau_is_flagged_and_error_is_a_lower_bound():
    # AR(1) with phi = 0.999: g = 1999 (exact), so 4096 samples hold about 2 independent
    # ones. No blocking level with >= 16 blocks reaches the plateau.
    n = 4096
    x = ar1(0.999, n, 21)
    est = block_average(x)
    assert not est.reliable
    assert "no plateau" in est.reason
    assert est.stderr < ar1_exact_stderr(0.999, n)
    # Random walk: var(mean) grows without bound, so there is never a plateau.
    walk = np.cumsum(np.random.default_rng(22).normal(size=2**15))
    est = block_average(walk)
    assert not est.reliable and "no plateau" in est.reason


def test_detect_equilibration_finds_injected_transient():
    # Exponential transient of amplitude 20 sigma_x and decay time 300 on AR(1) noise with
    # phi = 0.5. It falls below the noise level sigma_x at t = 300 ln 20 = 899. The cut must
    # come after that and well before the end (< T/4).
    T, tau, amp, phi = 20000, 300.0, 20.0, 0.5
    t_decayed = tau * math.log(amp)
    for seed in (31, 32, 33, 34, 35):
        x = amp * np.exp(-np.arange(T) / tau) + ar1(phi, T, seed)
        t0, g, n_eff = detect_equilibration(x)
        assert t_decayed < t0 < T / 4, (seed, t0)
        # Internal consistency with the definition N_eff = (T - t0)/g(t0).
        assert g == pytest.approx(statistical_inefficiency(x[t0:]))
        assert n_eff == pytest.approx((T - t0) / g)
        # After the cut, the mean agrees with the stationary mean 0 within its error (4 sigma).
        est = block_average(x[t0:])
        assert est.reliable, est.reason
        assert abs(est.mean) <= 4.0 * est.stderr, (seed, est)


def test_drift_test_passes_stationary_series():
    # For a stationary series, z between the halves is ~N(0, 1), slightly widened by the
    # noise in the error estimates: about 0.5-1 % fall outside |z| <= 3. With a 1 % failure
    # rate, P(3 or more failures in 40) < 1 %.
    failures = 0
    for seed in range(40):
        d = drift_test(ar1(0.9, 2**15, 200 + seed), threshold=3.0)
        assert d.first_half.n_samples + d.second_half.n_samples == 2**15
        failures += not d.passed
    assert failures <= 2, failures


def test_drift_test_catches_slow_creep_with_small_error_bars():
    # A linear creep of 3 % of the mean over the run, under AR(1) noise of 3 % of the mean.
    # The block-averaged error of the whole run is below 0.3 % of the mean, ten times smaller
    # than the creep. The error bar alone cannot reveal the drift, but the halves differ by
    # about 1.5 % of the mean, many of their standard errors apart.
    T, mean = 2**15, 100.0
    for seed in (41, 42, 43):
        x = mean * (1.0 + 0.03 * np.arange(T) / T) + ar1(0.9, T, seed, sigma_x=3.0)
        assert block_average(x).stderr < 0.003 * mean
        d = drift_test(x, threshold=3.0)
        assert not d.passed
        assert d.z_score > 3.0
        # Expected (m2 - m1)/mean(x) = 1.5/101.5. Tolerance: 4 of the combined standard
        # errors of the two half-means.
        err = math.hypot(d.first_half.stderr, d.second_half.stderr)
        assert abs(d.relative_change * np.mean(x) - 1.5) <= 4.0 * err


def test_agreement():
    # Definition: z = (b - a)/sqrt(ea^2 + eb^2).
    z, ok = agreement(1.0, 0.1, 1.5, 0.1)
    assert z == pytest.approx(0.5 / math.sqrt(0.02))
    assert not ok
    assert agreement(1.0, 0.1, 1.5, 0.1, threshold=4.0)[1]
    # Tiny error bars, but the replicas agree within 1 % in relative terms.
    z, ok = agreement(100.0, 0.01, 100.5, 0.01, rel_tol=0.01)
    assert z > 30.0 and ok
    assert not agreement(100.0, 0.01, 102.0, 0.01, rel_tol=0.01)[1]
    assert agreement(2.0, 0.0, 2.0, 0.0) == (0.0, True)
    z, ok = agreement(2.0, 0.0, 2.1, 0.0)
    assert math.isinf(z) and not ok
    with pytest.raises(InputError, match="stderr_a"):
        agreement(1.0, -0.1, 1.0, 0.1)


def test_fluctuation_ratio_bivariate_gaussian():
    # Independent draws of a bivariate Gaussian (U, N). Exact ratio cov/var = -1.2/0.9.
    # Least-squares result: the slope's standard error is sqrt(var(U|N)/(T var N)), with
    # var(U|N) = var U - cov^2/var N. The jackknife error over B = 32 blocks has relative
    # uncertainty ~1/sqrt(2(B - 1)) = 0.127 (common practice), so the tolerance is 4 times
    # that.
    cov = np.array([[4.0, -1.2], [-1.2, 0.9]])
    exact = cov[0, 1] / cov[1, 1]
    T = 2**15
    se_exact = math.sqrt((cov[0, 0] - cov[0, 1] ** 2 / cov[1, 1]) / (T * cov[1, 1]))
    for seed in (51, 52, 53):
        un = np.random.default_rng(seed).multivariate_normal([-500.0, 30.0], cov, size=T)
        r, se = fluctuation_ratio(un[:, 0], un[:, 1], n_blocks=32)
        assert abs(r - exact) <= 4.0 * se, (seed, r, se)
        assert abs(se / se_exact - 1.0) <= 4.0 / math.sqrt(2 * 31), (seed, se, se_exact)


def test_fluctuation_ratio_correlated_series():
    # N is AR(1) with phi = 0.95 (g = 39). U = a N + independent AR(1) noise, so the exact
    # ratio is a. The contiguous blocks (1024 samples, > 2g) keep the jackknife error honest
    # for correlated data. The check is at 4 sigma.
    T, a = 2**15, -1.3
    for seed in (61, 62, 63):
        n = 30.0 + ar1(0.95, T, seed)
        u = -500.0 + a * n + ar1(0.9, T, seed + 100, sigma_x=0.5)
        r, se = fluctuation_ratio(u, n)
        assert abs(r - a) <= 4.0 * se, (seed, r, se)


def test_fluctuation_ratio_degenerate_cases():
    u = np.random.default_rng(7).normal(size=1000)
    r, se = fluctuation_ratio(u, np.full(1000, 12.0))
    assert math.isnan(r) and math.isnan(se)
    # g(N) = 199: not even 8 blocks of 2g fit into 2000 samples, so there is no error estimate.
    n = ar1(0.99, 2000, 8)
    r, se = fluctuation_ratio(2.0 * n + 0.1 * u[:1], n)
    assert math.isfinite(r) and math.isnan(se)
    with pytest.raises(InputError, match="lengths differ"):
        fluctuation_ratio(u, u[:-1])


def test_bad_input_raises_input_error():
    with pytest.raises(InputError, match="series"):
        block_average(np.array([1.0, np.nan, 2.0]))
    with pytest.raises(InputError, match="1-D"):
        block_average(np.zeros((3, 3)))
    with pytest.raises(InputError, match="empty"):
        statistical_inefficiency(np.array([]))
    with pytest.raises(InputError, match="min_blocks"):
        block_average(np.arange(100.0), min_blocks=1)
    with pytest.raises(InputError, match="n_candidates"):
        detect_equilibration(np.arange(100.0), n_candidates=0)
