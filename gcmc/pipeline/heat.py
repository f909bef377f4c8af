"""Fitting the isosteric-heat kernel (gcmc.kernel.heat) to the per-point heats of a build.

Per temperature and width: the points with a finite heat and a positive standard error s_i
(the jackknife error of the fluctuation ratio) at loadings n_i (the simulated absolute
densities) are fitted by weighted linear least squares, q_i ~ sum_k a_k n_i^k, with the
highest degree the points allow: min(3, N - 2), so that one degree of freedom is left. The
degree is not selected by a criterion (AICc, F-test): a selected lower degree biases the
zero-loading value a_0 by more than its error bar shows (measured on 400 synthetic sets from a
quadratic q(n), 8 points: AICc selection gave a mean squared standardised error of a_0 of 1.40
instead of 1; the fixed degree gives the value that the covariance scaling below implies,
tests/test_heat_kernel.py). Covariance: (A^T W A)^-1 scaled by max(1, chi2/dof), so that a
fit worse than the stated errors widens its own error bars. The loadings' own errors s_n,i
enter by the effective-variance method (J. Orear, Am. J. Phys. 50 (1982) 912): the weights use
s_i^2 + (dq/dn)_i^2 s_n,i^2 with the slope of the previous fit, two passes after a first one
with s_i alone (at high loading dq/dn s_n is comparable to s_i). The method is exact to first
order in s_n; measured at 5 % loading errors, chi2/dof is 1.02 for a straight line and 1.11 for
a cubic (the cubic's curvature follows part of the loading noise). A pore with no usable point gets
degree -1 (no heat).
"""

from __future__ import annotations

import numpy as np

from gcmc.kernel.heat import MAX_TERMS, HeatKernel


def fit_heat(
    loading: np.ndarray,
    heat: np.ndarray,
    stderr: np.ndarray,
    loading_stderr: np.ndarray | None = None,
    max_degree: int = MAX_TERMS - 1,
) -> tuple[np.ndarray, np.ndarray, int, float, int, tuple[float, float]]:
    """Fit q_st(n) for one pore (module docstring).

    Parameters
    ----------
    loading : numpy.ndarray
        Absolute densities n_i (nm^-3).
    heat : numpy.ndarray
        Isosteric heats q_i (kJ/mol).
    stderr : numpy.ndarray
        Their standard errors (kJ/mol); points without a positive finite error are left out.
    loading_stderr : numpy.ndarray, optional
        Standard errors of the loadings (nm^-3), propagated by effective variance; None or
        NaN: not propagated.
    max_degree : int
        Highest degree (<= 3); the fit uses min(max_degree, N - 2).

    Returns
    -------
    tuple
        (coefficients (4,), covariance (4, 4), degree, chi2, dof, (n_lo, n_hi)); degree -1 and
        NaN arrays when no point is usable.
    """
    n = np.asarray(loading, float)
    q = np.asarray(heat, float)
    s = np.asarray(stderr, float)
    sn = np.zeros_like(n) if loading_stderr is None else np.asarray(loading_stderr, float)
    sn = np.where(np.isfinite(sn), sn, 0.0)
    ok = np.isfinite(n) & np.isfinite(q) & np.isfinite(s) & (s > 0) & (n >= 0)
    coef = np.full(MAX_TERMS, np.nan)
    cov = np.full((MAX_TERMS, MAX_TERMS), np.nan)
    m = int(np.count_nonzero(ok))
    if m == 0:
        return coef, cov, -1, float("nan"), 0, (float("nan"), float("nan"))
    n, q, s, sn = n[ok], q[ok], s[ok], sn[ok]
    scale = max(float(np.max(n)), 1e-300)  # fit in n / scale: a well-conditioned design
    x = n / scale
    deg = min(max_degree, MAX_TERMS - 1, max(m - 2, 0))
    design = x[:, None] ** np.arange(deg + 1)
    eff = s
    passes = 3 if np.any(sn > 0) and deg > 0 else 1
    for i in range(passes):
        a = design / eff[:, None]
        b = q / eff
        sol, *_ = np.linalg.lstsq(a, b, rcond=None)
        if i < passes - 1:  # dq/dn at each point from this pass
            slope = (design[:, :-1] * np.arange(1, deg + 1)) @ sol[1:] / scale
            eff = np.sqrt(s**2 + (slope * sn) ** 2)
    r = a @ sol - b
    chi2 = float(r @ r)
    ata_inv = np.linalg.pinv(a.T @ a)
    dof = m - deg - 1
    k = deg + 1
    factor = max(1.0, chi2 / dof) if dof > 0 else 1.0
    back = scale ** -np.arange(k)  # a_i = sol_i / scale^i
    coef[:k] = sol * back
    cov[:k, :k] = ata_inv * factor * np.outer(back, back)
    return coef, cov, deg, chi2, dof, (float(np.min(n)), float(np.max(n)))


def heat_kernel(
    density_per_nm3: np.ndarray,
    heat_kJ_per_mol: np.ndarray,
    heat_stderr_kJ_per_mol: np.ndarray,
    accessible: np.ndarray,
    density_stderr_per_nm3: np.ndarray | None = None,
) -> HeatKernel:
    """The heat kernel of a build from its adsorption-branch point arrays, (T, W, P) each, and
    the accessibility (T, W); the densities' standard errors, when given, are propagated."""
    n = np.asarray(density_per_nm3, float)
    n_t, n_w = n.shape[:2]
    out = HeatKernel(
        coefficients=np.full((n_t, n_w, MAX_TERMS), np.nan),
        covariance=np.full((n_t, n_w, MAX_TERMS, MAX_TERMS), np.nan),
        degree=np.full((n_t, n_w), -1, dtype=int),
        chi2=np.full((n_t, n_w), np.nan),
        dof=np.zeros((n_t, n_w), dtype=int),
        loading_range_per_nm3=np.full((n_t, n_w, 2), np.nan),
    )
    for t in range(n_t):
        for j in range(n_w):
            if not accessible[t, j]:
                continue
            c, v, d, chi2, dof, rng = fit_heat(
                n[t, j],
                heat_kJ_per_mol[t, j],
                heat_stderr_kJ_per_mol[t, j],
                None if density_stderr_per_nm3 is None else density_stderr_per_nm3[t, j],
            )
            out.coefficients[t, j], out.covariance[t, j] = c, v
            out.degree[t, j], out.chi2[t, j], out.dof[t, j] = d, chi2, dof
            out.loading_range_per_nm3[t, j] = rng
    return out


__all__ = ["fit_heat", "heat_kernel"]
