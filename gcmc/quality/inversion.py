"""Reference regularised inversion of an isotherm into a pore-size distribution (PSD).

This module is part of the kernel *checks* (:mod:`gcmc.quality.criteria`): a plain, documented
inversion
used to find out whether a kernel, at a given noise level and on given pressures, can give
back a known distribution. It is not a product feature and makes no claim to be the best
inversion for measured data.

Problem (a Fredholm integral equation of the first kind): the amount adsorbed at pressure p_i is
    b_i = sum_j K(p_i, w_j) f_j dw_j,
with K the kernel (mmol per cm^3 of pore volume), f the PSD (cm^3/g per nm of width), dw_j the
quadrature weights of the width grid (trapezoid rule), b in mmol/g. Written A f = b with
A_ij = K_ij dw_j. With the noise sigma_i of b_i the rows are weighted: A_w = A / sigma,
b_w = b / sigma, so that the misfit ||A_w f - b_w||^2 is a chi-square.

Solution: Tikhonov regularisation (A.N. Tikhonov, Soviet Math. Dokl. 4 (1963) 1035) with the
second-difference operator L (rows [1, -2, 1]: a smoothness penalty on f, indexed on the
width grid; use a uniform grid so that it is a curvature penalty),
    min ||A_w f - b_w||^2 + lambda^2 ||L f||^2   subject to f >= 0,
solved as the stacked non-negative least-squares problem
    min || [A_w; lambda L] f - [b_w; 0] ||  subject to f >= 0
with :func:`scipy.optimize.nnls` (the active-set method of Lawson & Hanson, Solving Least
Squares Problems, 1974).

Choice of lambda, over a logarithmic grid of candidates:
* ``"gcv"`` (default): generalised cross-validation (G.H. Golub, M. Heath & G. Wahba,
  Technometrics 21 (1979) 215): minimise GCV(lambda) = m ||A_w f - b_w||^2 / (m - tr H)^2,
  H = A_F (A_F^T A_F + lambda^2 L_F^T L_F)^+ A_F^T the influence matrix of the *free* set F
  (the widths where f > 0; the active non-negativity constraints fix the others at 0), m the
  number of pressures.
* ``"l-curve"``: the corner of the L-curve (P.C. Hansen, SIAM Rev. 34 (1992) 561; P.C. Hansen &
  D.P. O'Leary, SIAM J. Sci. Comput. 14 (1993) 1487): the point of maximum signed curvature of
  (ln ||A_w f - b_w||, ln ||L f||) as a curve parametrised by ln lambda (derivatives by finite
  differences on the lambda grid).
"""

from __future__ import annotations

import contextlib
import ctypes
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from scipy.linalg import solve_triangular
from scipy.optimize import nnls

from gcmc.errors import InputError

METHODS = ("gcv", "l-curve")

#: Number of candidate lambdas and their span relative to the largest singular value of the
#: weighted kernel matrix (divided by ||L||_2 <= 4): from effectively unregularised to a
#: penalty as strong as the data term.
N_LAMBDAS = 41
LAMBDA_SPAN = (1e-7, 1.0)


@dataclass
class Inversion:
    """The outcome of one regularised inversion.

    ``psd``: f on the width grid (units of b divided by units of K and of width);
    ``lam``: the chosen lambda; ``method``: how it was chosen; ``fitted``: A f;
    ``chi2``: ||A_w f - b_w||^2; ``lambdas``, ``residual_norms`` (||A_w f - b_w||),
    ``seminorms`` (||L f||), ``criterion`` (GCV values, or L-curve curvature) over the grid.
    """

    psd: np.ndarray
    lam: float
    method: str
    fitted: np.ndarray
    chi2: float
    lambdas: np.ndarray
    residual_norms: np.ndarray
    seminorms: np.ndarray
    criterion: np.ndarray


_BLAS_SET = (
    "openblas_set_num_threads",
    "scipy_openblas_set_num_threads",
    "openblas_set_num_threads64_",
    "scipy_openblas_set_num_threads64_",
)
_BLAS_GET = (
    "openblas_get_num_threads",
    "scipy_openblas_get_num_threads",
    "openblas_get_num_threads64_",
    "scipy_openblas_get_num_threads64_",
)


def _openblas_handles() -> list[tuple[object, object]]:
    """(set, get) C functions of every OpenBLAS loaded in this process (Linux: found through
    /proc/self/maps); empty where none is found."""
    try:
        with open("/proc/self/maps") as fh:
            paths = sorted(
                {
                    line.split()[-1]
                    for line in fh
                    if "openblas" in line.lower() and line.split()[-1].startswith("/")
                }
            )
    except OSError:
        return []
    out = []
    for path in paths:
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        setter = next((getattr(lib, n) for n in _BLAS_SET if hasattr(lib, n)), None)
        getter = next((getattr(lib, n) for n in _BLAS_GET if hasattr(lib, n)), None)
        if setter is not None and getter is not None:
            setter.argtypes, setter.restype = [ctypes.c_int], None
            getter.argtypes, getter.restype = [], ctypes.c_int
            out.append((setter, getter))
    return out


@contextlib.contextmanager
def single_threaded_blas() -> Iterator[None]:
    """Run the enclosed code with one OpenBLAS thread, and restore the thread counts after.

    The checks solve thousands of small dense problems (tens of rows and columns); on a busy
    machine OpenBLAS's thread hand-offs then cost far more than the arithmetic (measured here:
    a whole ``gcmc check`` 12 s with the default threads, 0.5 s with one, on 2 loaded cores).
    A no-op where no OpenBLAS is found (other BLAS libraries, other systems)."""
    handles = _openblas_handles()
    before = [get() for _, get in handles]
    try:
        for setter, _ in handles:
            setter(1)
        yield
    finally:
        for (setter, _), n in zip(handles, before, strict=True):
            setter(int(n))


def second_difference(n: int) -> np.ndarray:
    """The (n-2) x n second-difference operator, rows [1, -2, 1]."""
    if n < 3:
        raise InputError(f"width grid: a second-difference operator needs >= 3 widths, got {n}")
    d = np.zeros((n - 2, n))
    i = np.arange(n - 2)
    d[i, i] = 1.0
    d[i, i + 1] = -2.0
    d[i, i + 2] = 1.0
    return d


def trapezoid_weights(x: np.ndarray) -> np.ndarray:
    """Quadrature weights of the trapezoid rule on the grid x (strictly increasing)."""
    x = np.asarray(x, dtype=float)
    if x.ndim != 1 or x.size < 2 or np.any(np.diff(x) <= 0.0):
        raise InputError("width grid: must be strictly increasing with at least 2 widths")
    h = np.diff(x)
    w = np.zeros_like(x)
    w[:-1] += 0.5 * h
    w[1:] += 0.5 * h
    return w


def solve_nnls_tikhonov(a_w: np.ndarray, b_w: np.ndarray, lam: float, op: np.ndarray) -> np.ndarray:
    """argmin ||a_w f - b_w||^2 + lam^2 ||op f||^2 subject to f >= 0 (stacked NNLS)."""
    m = np.vstack([a_w, lam * op])
    rhs = np.concatenate([b_w, np.zeros(op.shape[0])])
    f, _ = nnls(m, rhs, maxiter=50 * a_w.shape[1])
    return f


def gcv_value(a_w: np.ndarray, b_w: np.ndarray, f: np.ndarray, lam: float, op: np.ndarray) -> float:
    """GCV(lambda) with the influence matrix of the free set (see the module docstring)."""
    m = a_w.shape[0]
    r = a_w @ f - b_w
    free = f > 1e-12 * max(float(np.max(f)), 1e-300)
    if not np.any(free):
        trace = 0.0
    else:
        # tr H = ||A_F R^-1||_F^2 with S = [A_F; lam L_F] = Q R (no normal equations: the
        # conditioning is that of S, as with an SVD, at a fraction of the cost)
        a_f = a_w[:, free]
        r_mat = np.linalg.qr(np.vstack([a_f, lam * op[:, free]]), mode="r")
        diag = np.abs(np.diag(r_mat))
        if diag.size and np.min(diag) > 1e-13 * np.max(diag):
            g = solve_triangular(r_mat, a_f.T, trans="T", lower=False)  # R^-T A_F^T
            trace = float(np.sum(g * g))
        else:  # rank deficient: fall back to the SVD
            s = np.vstack([a_f, lam * op[:, free]])
            _, sv, vt = np.linalg.svd(s, full_matrices=False)
            keep = sv > sv[0] * 1e-13
            g = (a_f @ vt[keep].T) / sv[keep]
            trace = float(np.sum(g * g))
    denom = m - trace
    if denom <= 1e-9 * m:
        return float("inf")
    return float(m * (r @ r) / denom**2)


def l_curve_curvature(
    residual_norms: np.ndarray, seminorms: np.ndarray, lambdas: np.ndarray
) -> np.ndarray:
    """Signed curvature of (ln rho, ln eta) parametrised by ln lambda; NaN where undefined.

    Traversed with increasing lambda the L-curve runs down its vertical branch and turns right
    onto the horizontal one: a left turn, positive curvature, largest at the corner."""
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.log(residual_norms)
        y = np.log(seminorms)
    t = np.log(lambdas)
    ok = np.isfinite(x) & np.isfinite(y)
    kappa = np.full(t.shape, np.nan)
    if np.count_nonzero(ok) < 5:
        return kappa
    xs, ys, ts = x[ok], y[ok], t[ok]
    dx, dy = np.gradient(xs, ts), np.gradient(ys, ts)
    ddx, ddy = np.gradient(dx, ts), np.gradient(dy, ts)
    with np.errstate(divide="ignore", invalid="ignore"):
        k = (dx * ddy - dy * ddx) / (dx * dx + dy * dy) ** 1.5
    k[[0, -1]] = np.nan  # one-sided differences at the ends are not trusted
    kappa[ok] = k
    return kappa


def invert(
    kernel_matrix: np.ndarray,
    widths_nm: np.ndarray,
    amounts: np.ndarray,
    sigma: np.ndarray,
    method: str = "gcv",
    lambdas: np.ndarray | None = None,
) -> Inversion:
    """Invert amounts b (at the kernel matrix's pressures) into a PSD on ``widths_nm``.

    ``kernel_matrix``: K (pressures x widths), density per pore volume; ``amounts``: b;
    ``sigma``: the standard deviation of each b_i (> 0); ``method``: "gcv" or "l-curve".
    The PSD is in units of b / (units of K * nm).
    """
    if method not in METHODS:
        raise InputError(f"method: must be one of {', '.join(METHODS)}, got {method!r}")
    k = np.asarray(kernel_matrix, dtype=float)
    w = np.asarray(widths_nm, dtype=float)
    b = np.asarray(amounts, dtype=float)
    s = np.asarray(sigma, dtype=float)
    if k.ndim != 2 or k.shape[1] != w.size or b.shape != (k.shape[0],) or s.shape != b.shape:
        raise InputError(
            f"inversion: shapes do not match (K {k.shape}, widths {w.shape}, b {b.shape}, "
            f"sigma {s.shape})"
        )
    if not (np.all(np.isfinite(k)) and np.all(np.isfinite(b))):
        raise InputError("inversion: the kernel matrix and the amounts must be finite")
    if not np.all(np.isfinite(s) & (s > 0.0)):
        raise InputError("inversion: sigma must be finite and > 0")
    a_w = k * trapezoid_weights(w)[None, :] / s[:, None]
    b_w = b / s
    op = second_difference(w.size)
    if lambdas is None:
        s_max = float(np.linalg.norm(a_w, 2))
        lambdas = s_max / 4.0 * np.geomspace(LAMBDA_SPAN[0], LAMBDA_SPAN[1], N_LAMBDAS)
    lambdas = np.asarray(lambdas, dtype=float)
    if lambdas.ndim != 1 or lambdas.size < 5 or np.any(lambdas <= 0.0):
        raise InputError("lambdas: need at least 5 positive candidates")
    fs = [solve_nnls_tikhonov(a_w, b_w, float(lam), op) for lam in lambdas]
    rho = np.array([np.linalg.norm(a_w @ f - b_w) for f in fs])
    eta = np.array([np.linalg.norm(op @ f) for f in fs])
    if method == "gcv":
        crit = np.array(
            [gcv_value(a_w, b_w, f, float(lam), op) for f, lam in zip(fs, lambdas, strict=True)]
        )
        i = int(np.nanargmin(np.where(np.isfinite(crit), crit, np.nan)))
    else:
        crit = l_curve_curvature(rho, eta, lambdas)
        if np.all(~np.isfinite(crit)):
            raise InputError("l-curve: the curvature is undefined on the lambda grid")
        i = int(np.nanargmax(crit))
    f = fs[i]
    return Inversion(
        psd=f,
        lam=float(lambdas[i]),
        method=method,
        fitted=k @ (f * trapezoid_weights(w)),
        chi2=float(rho[i] ** 2),
        lambdas=lambdas,
        residual_norms=rho,
        seminorms=eta,
        criterion=crit,
    )


__all__ = [
    "METHODS",
    "single_threaded_blas",
    "Inversion",
    "gcv_value",
    "invert",
    "l_curve_curvature",
    "second_difference",
    "solve_nnls_tikhonov",
    "trapezoid_weights",
]
