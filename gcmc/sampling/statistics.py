"""Error bars, equilibration cuts and fluctuation ratios for correlated Monte Carlo series.

Every number the engine reports as a mean goes through this module, so that each one carries a
standard error that accounts for correlation between successive samples, and a flag when that
error cannot be trusted.

- :func:`block_average`: blocking analysis of Flyvbjerg & Petersen, J. Chem. Phys. 91 (1989)
  461. The plateau is found automatically with the lag-one autocorrelation test of
  Jonsson, Phys. Rev. E 98 (2018) 043304 (made a little stricter, see _plateau_level). The
  error is read two levels above the first level that passes, which removes the low bias of
  reading it right at the edge. The estimate is flagged when the plateau is not reached while
  at least ``min_blocks`` blocks remain.
- :func:`statistical_inefficiency`: g = 1 + 2 sum_t (1 - t/T) C_t, truncated at the first
  negative C_t, with the autocorrelation computed by FFT.
- :func:`detect_equilibration`: the equilibration cut t0 that maximises the effective number
  of samples (T - t0)/g(t0) (Chodera, J. Chem. Theory Comput. 12 (2016) 1799).
- :func:`drift_test`, :func:`agreement`: z-scores between two halves of a run, or between
  two independent replicas.
- :func:`fluctuation_ratio`: cov(U, N)/var(N), the fluctuation term of the isosteric heat, with
  a jackknife error over contiguous blocks.

Only numpy is used. Every routine is O(T) or O(T log T). For 1e6 samples each call takes a
few tenths of a second, except :func:`detect_equilibration`, which performs ``n_candidates``
FFTs: about 4 s at the default of 50.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from gcmc.errors import InputError

__all__ = [
    "DriftTest",
    "SeriesEstimate",
    "agreement",
    "block_average",
    "detect_equilibration",
    "drift_test",
    "fluctuation_ratio",
    "statistical_inefficiency",
]

#: The error is read this many blocking levels above the first level that passes the
#: residual-correlation test (see block_average).
PLATEAU_MARGIN_LEVELS = 2
#: 0.99 quantile of the standard normal distribution. The plateau test works at the 1 % level,
#: as in Jonsson (2018).
_Z_99 = 2.3263478740408408
#: Fewest contiguous blocks for which fluctuation_ratio reports a jackknife error.
MIN_JACKKNIFE_BLOCKS = 8


@dataclass(frozen=True)
class SeriesEstimate:
    """Mean of a correlated series with its standard error and a reliability flag.

    ``stderr`` is the standard error of the mean at the chosen blocking level and
    ``stderr_uncertainty`` its own standard error, stderr/sqrt(2(n'-1)), where n' is the number
    of blocks at that level. ``inefficiency`` g = n*stderr^2/var(x) (``var`` with ddof=1). It is
    1 for uncorrelated data, larger for positively correlated data, and may fall slightly
    below 1 through noise or for anticorrelated data. ``n_effective`` = n/g. When ``reliable``
    is False, ``reason`` says why. If no plateau was found, ``stderr`` is the value at the
    coarsest level that still has ``min_blocks`` blocks, which is then a lower bound.
    """

    mean: float
    stderr: float
    stderr_uncertainty: float
    inefficiency: float
    n_samples: int
    n_effective: float
    reliable: bool
    reason: str


@dataclass(frozen=True)
class DriftTest:
    """Comparison of the two halves of a series.

    ``z_score`` = (m2 - m1)/sqrt(e1^2 + e2^2). ``relative_change`` = (m2 - m1)/|mean of the
    whole series|. ``passed`` is True only when the z-score is finite and |z| <= threshold.
    The reliability of each half is in ``first_half.reliable`` and ``second_half.reliable``,
    and a caller should check it too.
    """

    first_half: SeriesEstimate
    second_half: SeriesEstimate
    z_score: float
    relative_change: float
    passed: bool


# --------------------------------------------------------------------------------------------
# helpers


def _as_series(x: np.ndarray, name: str) -> np.ndarray:
    """Validate a 1-D finite series and return it as float64."""
    try:
        a = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name}: not a numeric series ({exc})") from None
    if a.ndim != 1:
        raise InputError(f"{name}: expected a 1-D series, got shape {a.shape}")
    if a.size == 0:
        raise InputError(f"{name}: empty series")
    if not np.all(np.isfinite(a)):
        raise InputError(f"{name}: contains NaN or infinite values")
    return a


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """sum(a*b) with numpy's pairwise summation. This avoids np.dot, whose threaded BLAS call
    can be slow on a busy machine for short vectors."""
    return float(np.sum(a * b))


def _is_constant(a: np.ndarray) -> bool:
    # Exact test. Deviations from np.mean can be non-zero through rounding even when every
    # sample is the same.
    return bool(a.max() == a.min())


def _chi2_quantile_99(df: np.ndarray) -> np.ndarray:
    """0.99 quantile of chi-squared with ``df`` degrees of freedom (Wilson-Hilferty).

    Wilson & Hilferty, Proc. Natl. Acad. Sci. 17 (1931) 684. The relative error is below 1 %
    for df >= 1 (6.59 against the exact 6.63 at df = 1), which is far below what matters for
    choosing a level.
    """
    df = np.asarray(df, dtype=np.float64)
    h = 2.0 / (9.0 * df)
    return df * (1.0 - h + _Z_99 * np.sqrt(h)) ** 3


def _blocking_levels(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Blocking transformation x'_i = (x_2i + x_2i+1)/2, repeated while >= 2 blocks remain.

    Returns, for each level k, the number of blocks n_k, the biased variance c0_k of the block
    means, and their lag-one autocovariance gamma_k (sum of n_k - 1 products divided by n_k).
    When n_k is odd, the last block is dropped before the next transformation.
    """
    sizes, c0s, gammas = [], [], []
    b = a
    while b.size >= 2:
        d = b - b.mean()
        sizes.append(b.size)
        c0s.append(_dot(d, d) / b.size)
        gammas.append(_dot(d[:-1], d[1:]) / b.size)
        m = b.size // 2
        b = 0.5 * (b[0 : 2 * m : 2] + b[1 : 2 * m : 2])
    return np.asarray(sizes, dtype=np.int64), np.asarray(c0s), np.asarray(gammas)


def _plateau_level(sizes: np.ndarray, c0s: np.ndarray, gammas: np.ndarray) -> int:
    """First level at which the blocked series shows no significant lag-one correlation.

    Jonsson (2018): let rho_k = gamma_k/c0_k. If the block means from level j on are
    uncorrelated, then sqrt(n_k)*rho_k is asymptotically standard normal. So
    M_j = sum_{k>=j} n_k rho_k^2 is chi-squared, with one degree of freedom per level in the
    sum. A level passes when M_j is below its 0.99 quantile. This implementation also requires
    the level's own term n_j rho_j^2 to be below the one-degree-of-freedom 0.99 quantile. The
    cumulative sum alone dilutes a clear correlation at one level among many near-null coarse
    levels. If no level passes, the last level is returned.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(c0s > 0.0, gammas / c0s, 0.0)
    terms = sizes * rho**2
    m_stat = np.cumsum(terms[::-1])[::-1]
    df = np.arange(sizes.size, 0, -1)
    ok = np.nonzero((m_stat < _chi2_quantile_99(df)) & (terms < _chi2_quantile_99(1)))[0]
    return int(ok[0]) if ok.size else int(sizes.size - 1)


def _fast_fft_length(n: int) -> int:
    """Smallest 2^a 3^b 5^c >= n. numpy's pocketfft is fast for these, often faster than the
    next power of two."""
    best = 1 << max(0, (n - 1).bit_length())
    p5 = 1
    while p5 < best:
        p35 = p5
        while p35 < best:
            m = p35
            while m < n:
                m *= 2
            best = min(best, m)
            p35 *= 3
        p5 *= 5
    return best


def _autocovariance_sums(d: np.ndarray) -> np.ndarray:
    """S_t = sum_i d_i d_{i+t} for t = 0..T-1, by zero-padded FFT (no circular wrap-around
    since the padded length is >= 2T - 1)."""
    T = d.size
    nfft = _fast_fft_length(2 * T - 1)
    f = np.fft.rfft(d, nfft)
    return np.fft.irfft(f.real**2 + f.imag**2, nfft)[:T]


# --------------------------------------------------------------------------------------------
# public API


def block_average(x: np.ndarray, min_blocks: int = 16) -> SeriesEstimate:
    """Mean and standard error of a correlated series by Flyvbjerg-Petersen blocking.

    At blocking level k (n_k blocks), the squared error of the mean is c0_k/(n_k - 1), where
    c0_k is the biased variance of the block means. Its relative uncertainty is
    1/sqrt(2(n_k - 1)) (Flyvbjerg & Petersen 1989).

    How the level is chosen:

    - Jonsson's (2018) test finds the first level j at which the block means show no
      significant lag-one correlation (see _plateau_level).
    - The error is read PLATEAU_MARGIN_LEVELS (2) levels higher, at blocks four times longer.
    - Why the margin: at level j the residual correlation rho_j is only "undetectable", which
      still allows a low bias of about rho_j in the error, up to ~3 times the estimate's own
      noise. Since rho falls as 1/(block length), two levels up the bias is below that noise.
      This was checked on AR(1) series in tests/test_statistics.py.

    The result is unreliable (``reliable`` False, with a ``reason``) when:

    - there are fewer than 2*min_blocks samples ("too short");
    - the series is exactly constant ("no fluctuations"). This is the signature of a frozen
      run, whose true error cannot be seen from the data;
    - the reading level would have fewer than ``min_blocks`` blocks ("no plateau"). The blocked
      error is then still rising. The error returned is the one at the coarsest level that
      still has ``min_blocks`` blocks, which is then typically a lower bound.
    """
    if isinstance(min_blocks, bool) or not isinstance(min_blocks, int | np.integer):
        raise InputError(f"min_blocks: expected an integer, got {min_blocks!r}")
    if min_blocks < 2:
        raise InputError(f"min_blocks: must be >= 2, got {min_blocks}")
    a = _as_series(x, "series")
    n = int(a.size)
    nan = math.nan

    if n < 2:
        return SeriesEstimate(
            mean=float(a[0]),
            stderr=nan,
            stderr_uncertainty=nan,
            inefficiency=nan,
            n_samples=n,
            n_effective=nan,
            reliable=False,
            reason=f"too short: {n} sample",
        )
    if _is_constant(a):
        return SeriesEstimate(
            mean=float(a[0]),
            stderr=0.0,
            stderr_uncertainty=0.0,
            inefficiency=nan,
            n_samples=n,
            n_effective=nan,
            reliable=False,
            reason="no fluctuations: constant series (frozen run?), error cannot be estimated",
        )
    mean = float(np.mean(a))
    var = float(np.var(a, ddof=1))  # > 0 here since n >= 2 and not constant

    sizes, c0s, gammas = _blocking_levels(a)
    err2 = c0s / (sizes - 1)
    j_test = _plateau_level(sizes, c0s, gammas)
    j = j_test + PLATEAU_MARGIN_LEVELS

    reliable = True
    reason = ""
    if n < 2 * min_blocks:
        reliable = False
        reason = f"too short: {n} samples < 2*min_blocks = {2 * min_blocks}"
        j = min(j, sizes.size - 1)
    elif j >= sizes.size or sizes[j] < min_blocks:
        reliable = False
        # Report the coarsest level that still has min_blocks blocks. It is a lower bound.
        j = int(np.nonzero(sizes >= min_blocks)[0][-1])
        reason = (
            f"no plateau: blocked error not converged with >= {min_blocks} blocks "
            f"(needs blocks longer than {n // int(sizes[j])} samples)"
        )

    stderr = float(math.sqrt(err2[j]))
    stderr_unc = stderr / math.sqrt(2.0 * (sizes[j] - 1))
    if reliable and stderr == 0.0:
        reliable = False
        reason = "no fluctuations of the block means: error cannot be estimated"
    g = n * stderr**2 / var
    n_eff = n / g if g > 0.0 else nan
    return SeriesEstimate(
        mean=mean,
        stderr=stderr,
        stderr_uncertainty=float(stderr_unc),
        inefficiency=float(g),
        n_samples=n,
        n_effective=float(n_eff),
        reliable=reliable,
        reason=reason,
    )


def statistical_inefficiency(x: np.ndarray) -> float:
    """Statistical inefficiency g = 1 + 2 sum_{t>=1} (1 - t/T) C_t.

    C_t is the normalised autocorrelation at lag t. Each lag's covariance is divided by its
    number of pairs, T - t, and by the biased variance. The sum stops before the first lag
    with C_t <= 0, following Chodera (2016), so g >= 1. Returns NaN for fewer than 2 samples or
    for a constant series, where g is undefined.
    """
    a = _as_series(x, "series")
    T = a.size
    if T < 2 or _is_constant(a):
        return math.nan
    d = a - a.mean()
    s = _autocovariance_sums(d)
    c0 = s[0] / T
    if not c0 > 0.0:
        return math.nan
    t = np.arange(1, T, dtype=np.float64)
    c = s[1:] / (T - t) / c0
    nonpos = np.flatnonzero(c <= 0.0)
    m = int(nonpos[0]) if nonpos.size else T - 1
    g = 1.0 + 2.0 * float(np.sum((1.0 - t[:m] / T) * c[:m]))
    return max(1.0, g)


def detect_equilibration(x: np.ndarray, n_candidates: int = 50) -> tuple[int, float, float]:
    """Equilibration cut by maximum effective sample size (Chodera 2016).

    ``n_candidates`` values of t0 are spread evenly over [0, T//2]. For each one, g(t0) is the
    statistical inefficiency of x[t0:] and N_eff(t0) = (T - t0)/g(t0). The function returns
    (t0, g(t0), N_eff(t0)) at the maximum. A candidate whose remaining series is constant has
    no measurable fluctuations and is skipped. If every candidate is constant, the result is
    (0, nan, 0.0).
    """
    if isinstance(n_candidates, bool) or not isinstance(n_candidates, int | np.integer):
        raise InputError(f"n_candidates: expected an integer, got {n_candidates!r}")
    if n_candidates < 1:
        raise InputError(f"n_candidates: must be >= 1, got {n_candidates}")
    a = _as_series(x, "series")
    T = int(a.size)
    candidates = np.unique(np.linspace(0, T // 2, int(n_candidates)).round().astype(np.int64))
    best = (0, math.nan, 0.0)
    for t0 in candidates:
        t0 = int(t0)
        if T - t0 < 2:
            continue
        g = statistical_inefficiency(a[t0:])
        if not math.isfinite(g):
            continue
        n_eff = (T - t0) / g
        if n_eff > best[2]:
            best = (t0, g, n_eff)
    return best


def drift_test(x: np.ndarray, threshold: float = 3.0, min_blocks: int = 16) -> DriftTest:
    """Compare the block-averaged means of the first and second halves of ``x``.

    A slow creep can make each block error small while the mean keeps moving. The run then
    looks converged by its error bar alone. The z-score between the halves catches that.
    """
    if not (isinstance(threshold, int | float) and threshold > 0.0):
        raise InputError(f"threshold: must be a positive number, got {threshold!r}")
    a = _as_series(x, "series")
    if a.size < 2:
        raise InputError(f"series: need at least 2 samples for a drift test, got {a.size}")
    h = a.size // 2
    e1 = block_average(a[:h], min_blocks=min_blocks)
    e2 = block_average(a[h:], min_blocks=min_blocks)
    diff = e2.mean - e1.mean
    denom = math.sqrt(e1.stderr**2 + e2.stderr**2)
    if denom > 0.0:
        z = diff / denom
    else:
        z = math.nan if diff == 0.0 else math.copysign(math.inf, diff)
    overall = float(np.mean(a))
    rel = diff / abs(overall) if overall != 0.0 else math.nan
    passed = bool(math.isfinite(z) and abs(z) <= threshold)
    return DriftTest(first_half=e1, second_half=e2, z_score=z, relative_change=rel, passed=passed)


def agreement(
    mean_a: float,
    stderr_a: float,
    mean_b: float,
    stderr_b: float,
    threshold: float = 3.0,
    rel_tol: float = 0.0,
) -> tuple[float, bool]:
    """z-score between two independent estimates, and whether they agree.

    z = (mean_b - mean_a)/sqrt(stderr_a^2 + stderr_b^2). They agree when |z| <= threshold, or
    when |mean_b - mean_a| <= rel_tol*|(mean_a + mean_b)/2|. The second test expresses a target
    such as "replicas agree within 1 %" (rel_tol=0.01) when the error bars are tiny. NaN errors
    give z = NaN, which fails the z criterion but not the relative one.
    """
    for name, v in (("stderr_a", stderr_a), ("stderr_b", stderr_b)):
        if v < 0.0:
            raise InputError(f"{name}: must be >= 0, got {v}")
    if not threshold > 0.0:
        raise InputError(f"threshold: must be > 0, got {threshold}")
    if not rel_tol >= 0.0:
        raise InputError(f"rel_tol: must be >= 0, got {rel_tol}")
    diff = float(mean_b) - float(mean_a)
    denom = math.sqrt(float(stderr_a) ** 2 + float(stderr_b) ** 2)
    if denom > 0.0:
        z = diff / denom
    elif math.isnan(denom) or math.isnan(diff):
        z = math.nan
    else:
        z = 0.0 if diff == 0.0 else math.copysign(math.inf, diff)
    within_z = math.isfinite(z) and abs(z) <= threshold
    scale = abs(0.5 * (float(mean_a) + float(mean_b)))
    within_rel = rel_tol > 0.0 and abs(diff) <= rel_tol * scale
    return z, bool(within_z or within_rel)


def fluctuation_ratio(u: np.ndarray, n: np.ndarray, n_blocks: int = 32) -> tuple[float, float]:
    """cov(U, N)/var(N) and its jackknife standard error over contiguous blocks.

    This is the fluctuation term of the isosteric heat, q_st = kT - cov(U, N)/var(N), for an
    ideal bulk gas (Nicholson & Parsonage 1982). The series is split into ``n_blocks``
    near-equal contiguous blocks. If those would be shorter than 2*g, with g the larger of the
    statistical inefficiencies of U and N, fewer and longer blocks are used. If fewer than
    MIN_JACKKNIFE_BLOCKS blocks of that length fit, the error is NaN (not estimable). The
    ratio and error are (nan, nan) when N does not fluctuate.
    """
    if isinstance(n_blocks, bool) or not isinstance(n_blocks, int | np.integer):
        raise InputError(f"n_blocks: expected an integer, got {n_blocks!r}")
    if n_blocks < MIN_JACKKNIFE_BLOCKS:
        raise InputError(f"n_blocks: must be >= {MIN_JACKKNIFE_BLOCKS}, got {n_blocks}")
    uu = _as_series(u, "u")
    nn = _as_series(n, "n")
    if uu.size != nn.size:
        raise InputError(f"u, n: lengths differ ({uu.size} and {nn.size})")
    T = int(nn.size)
    if T < 2 or _is_constant(nn):
        return math.nan, math.nan
    du = uu - uu.mean()
    dn = nn - nn.mean()
    snn = _dot(dn, dn)
    ratio = _dot(du, dn) / snn

    g_n = statistical_inefficiency(nn)
    g_u = statistical_inefficiency(uu)
    g = max(g_n, g_u) if math.isfinite(g_u) else g_n
    min_len = max(1, math.ceil(2.0 * g))
    n_b = min(int(n_blocks), T // min_len)
    if n_b < MIN_JACKKNIFE_BLOCKS:
        return ratio, math.nan

    edges = np.linspace(0, T, n_b + 1).round().astype(np.int64)
    starts = edges[:-1]
    cnt = np.diff(edges).astype(np.float64)
    bu = np.add.reduceat(du, starts)
    bn = np.add.reduceat(dn, starts)
    bun = np.add.reduceat(du * dn, starts)
    bnn = np.add.reduceat(dn * dn, starts)
    m = T - cnt
    su, sn = bu.sum() - bu, bn.sum() - bn
    mu, mn = su / m, sn / m
    cov_i = (bun.sum() - bun) / m - mu * mn
    var_i = (bnn.sum() - bnn) / m - mn * mn
    if np.any(var_i <= 0.0):
        return ratio, math.nan
    theta = cov_i / var_i
    stderr = math.sqrt((n_b - 1) / n_b * float(np.sum((theta - theta.mean()) ** 2)))
    return ratio, stderr
