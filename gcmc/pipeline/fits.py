"""Weighted least-squares fits of correlating forms to simulated single-pore isotherms, and
model selection.

Inputs: pressures p (Pa, > 0, strictly increasing), absolute densities n (molecules/nm^3,
>= 0) and their standard errors (same units). The forms are in :mod:`gcmc.kernel.forms`.

Statistics (stated once, used everywhere here)
----------------------------------------------
* Weighted residuals r_i = (n_fit(p_i) - n_i)/sigma_i; chi2 = sum r_i^2, dof = N - k.
  :attr:`FitResult.residuals` stores (n_i - n_fit)/sigma_i.
* The standard errors are taken as known (block-averaging estimates), so the covariance is the
  *unscaled* (J^T J)^-1, J = d r / d parameters at the optimum (analytic, Form.gradient), NOT
  multiplied by the reduced chi2. An accepted fit has reduced chi2 ~ 1 anyway; for a rejected
  one the covariance is the one the stated errors imply.
* Goodness of fit: p-value = P(chi2_dof >= chi2), chi-square survival function.
* AICc = chi2 + 2k + 2k(k+1)/(N-k-1): Akaike's criterion, where -2 ln L = chi2 + const for
  Gaussian errors of known variance, with the small-sample correction of Hurvich & Tsai,
  Biometrika 76 (1989) 297. Infinite when N - k - 1 <= 0. BIC = chi2 + k ln N is available.
* Acceptance: p-value >= p_value_min (default 1e-3) and a full-rank Jacobian (finite
  covariance). Among accepted forms the lowest AICc (or BIC) wins.
* When no form is accepted: ``monotone_interpolant``. The absolute loading of a pore is
  non-decreasing in the chemical potential (d<N>/d(beta mu) = var N >= 0, an exact
  fluctuation identity), so the data are first projected onto non-decreasing sequences by
  weighted isotonic regression (pool-adjacent-violators; Ayer, Brunk, Ewing, Reid & Silverman,
  Ann. Math. Statist. 26 (1955) 641), and the projection is interpolated in ln p with the
  monotone cubic of :func:`gcmc.kernel.forms.pchip_slopes`. Its dof is N minus the number of pooled
  blocks (the effective degrees of freedom of isotonic regression, Meyer & Woodroofe,
  Ann. Statist. 28 (2000) 1083, from memory). It is never ``accepted``.
* A pore too narrow for the probe (n == 0 at every point) gives the form ``"zero"``.

Standard-error rule (:func:`effective_stderr`)
----------------------------------------------
A point whose error is missing (non-finite or <= 0: "could not be estimated") gets
r_med |n_i|, r_med the median relative error of the points that have one, or the smallest
valid error if that is larger. Then every error is floored:
sigma_i = max(sigma_i, 1e-3 |n_i|, 1e-6 max|n|). The relative floor is a design choice: GCMC
loadings carry systematic errors (finite box, cutoff, equation of state) that are rarely
below 0.1 %, and a correlating form is not asked to be better than that. The absolute floor
keeps points with n = 0 finite. If no point has a valid error, the floors alone are used
(the goodness-of-fit test is then against 0.1 % errors and normally sends the isotherm to the
interpolant).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, stats

from gcmc.errors import InputError
from gcmc.kernel import forms as _forms
from gcmc.kernel.data import FitRecord

# the standard-error rule lives beside the forms (the quality checks use it too)
from gcmc.kernel.forms import (  # noqa: E402, F401 - re-exported: fits.effective_stderr
    ABSOLUTE_STDERR_FLOOR,
    DEFAULT_FORMS,
    FORMS,
    INTERPOLANT_FORM,
    RELATIVE_STDERR_FLOOR,
    ZERO_FORM,
    Form,
    effective_stderr,
)

# data-relative bounds for the scale parameters (generous; hitting one is reported)
AMOUNT_RANGE = (1e-9, 1e4)  # times max n
AFFINITY_RANGE = (1e-6, 1e6)  # 1e-6/p_max .. 1e6/p_min

_MAX_NFEV = 200  # per start; converged fits of these forms take 5-100
_RANK_RTOL = 1e-9  # singular-value ratio below which J is treated as rank deficient


@dataclass(frozen=True)
class FitResult(FitRecord):
    """The outcome of fitting one isotherm: the stored :class:`gcmc.kernel.data.FitRecord`
    fields, plus what only the fit knows.

    ``parameters`` are in the natural units of the form's ``parameter_names``; for
    ``monotone_interpolant`` they are [ln p_1..K, n_1..K, slopes_1..K]
    (:func:`gcmc.kernel.forms.pack_interpolant`) and the covariance is 3K x 3K with the knot
    pressures exact (zero), the knot values' variances on the diagonal of the middle block,
    and NaN for the slopes (not propagated). ``candidates`` has one entry
    (name, reduced_chi2, aicc, accepted) per form tried. ``p_range`` is the simulated range
    (p_min, p_max) that :func:`evaluate` uses for its policies. ``at_bound`` names the
    parameters that ended on a bound of the optimiser (for those the covariance ignores
    the constraint). :meth:`record` gives the stored part.
    """

    candidates: tuple[tuple[str, float, float, bool], ...] = ()
    p_range: tuple[float, float] = (float("nan"), float("nan"))
    at_bound: tuple[str, ...] = field(default=())


# --------------------------------------------------------------------------------------------
# input handling
# --------------------------------------------------------------------------------------------
def _check_data(
    p: np.ndarray, n: np.ndarray, stderr: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    p = np.asarray(p, dtype=float)
    n = np.asarray(n, dtype=float)
    s = np.asarray(stderr, dtype=float)
    if p.ndim != 1 or p.size < 2:
        raise InputError("p: must be a 1-D array of at least 2 pressures")
    if n.shape != p.shape:
        raise InputError(f"n: shape {n.shape} does not match p {p.shape}")
    if s.shape != p.shape:
        raise InputError(f"stderr: shape {s.shape} does not match p {p.shape}")
    if not np.all(np.isfinite(p)) or np.any(p <= 0.0):
        raise InputError("p: pressures must be finite and > 0")
    if np.any(np.diff(p) <= 0.0):
        raise InputError("p: pressures must be strictly increasing")
    if not np.all(np.isfinite(n)):
        raise InputError("n: densities must be finite")
    if np.any(n < 0.0):
        raise InputError("n: absolute densities must be >= 0")
    if np.any(s[np.isfinite(s)] < 0.0):
        raise InputError("stderr: standard errors must not be negative")
    return p, n, s


# --------------------------------------------------------------------------------------------
# parameter transforms, bounds and starting guesses
# --------------------------------------------------------------------------------------------
def _bounds(f: Form, p: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bounds on the natural parameters."""
    n_top = float(np.max(n))
    lo, hi = [], []
    for kind, sb in zip(f.kinds, f.shape_bounds, strict=True):
        if kind == "amount":
            lo.append(AMOUNT_RANGE[0] * n_top)
            hi.append(AMOUNT_RANGE[1] * n_top)
        elif kind == "affinity":
            lo.append(AFFINITY_RANGE[0] / p[-1])
            hi.append(AFFINITY_RANGE[1] / p[0])
        else:
            assert sb is not None
            lo.append(sb[0])
            hi.append(sb[1])
    return np.array(lo), np.array(hi)


def _to_z(f: Form, theta: np.ndarray) -> np.ndarray:
    log = np.array(f.log_scale)
    return np.where(log, np.log(np.where(log, theta, 1.0)), theta)


def _from_z(f: Form, z: np.ndarray) -> np.ndarray:
    log = np.array(f.log_scale)
    return np.where(log, np.exp(np.where(log, z, 0.0)), z)


def _x_at_fraction(x: np.ndarray, n: np.ndarray, level: float) -> float:
    """ln p where the (running maximum of the) data first reach ``level``."""
    nm = np.maximum.accumulate(n)
    if level <= nm[0]:
        return float(x[0] - (nm[0] - level) / max(nm[0], 1e-300))
    if level >= nm[-1]:
        return float(x[-1])
    j = int(np.searchsorted(nm, level, side="left"))
    x0, x1, y0, y1 = x[j - 1], x[j], nm[j - 1], nm[j]
    return float(x0 + (x1 - x0) * (level - y0) / (y1 - y0)) if y1 > y0 else float(x1)


def _langmuir_affinity(p: np.ndarray, n: np.ndarray, n_m: float) -> float:
    """Median of the Langmuir linearisation b = n/((n_m - n) p) over the unsaturated points."""
    ok = (n > 0.0) & (n < 0.98 * n_m)
    if not np.any(ok):
        return 1.0 / float(np.exp(np.mean(np.log(p))))
    return float(np.median(n[ok] / ((n_m - n[ok]) * p[ok])))


def _guesses(f: Form, p: np.ndarray, n: np.ndarray) -> list[np.ndarray]:
    n_top = float(np.max(n))
    x = np.log(p)
    out: list[np.ndarray] = []
    if f.name in ("langmuir", "sips", "toth"):
        for scale in (1.05, 1.5, 4.0):
            n_m = scale * n_top
            b = _langmuir_affinity(p, n, n_m)
            if f.name == "langmuir":
                out.append(np.array([n_m, b]))
            else:
                for shape in (0.5, 1.0, 2.0):
                    out.append(np.array([n_m, b, shape]))
    elif f.name == "hill_de_boer":
        for scale in (1.05, 1.5, 3.0):
            n_m = scale * n_top
            th = n / n_m
            ok = (th > 0.0) & (th < 0.99)
            for c in (0.5, 3.0, 6.0):
                if np.any(ok):
                    xx = th[ok] / (1.0 - th[ok])
                    b = float(np.median(xx * np.exp(xx - c * th[ok]) / p[ok]))
                else:
                    b = 1.0 / float(p[len(p) // 2])
                out.append(np.array([n_m, b, c]))
    elif f.name == "dual_site_langmuir_sips":
        for g in _step_guesses(x, n, 2):
            n1, b1, n2, b2, m2 = g
            out.append(np.array([n1, b1, n2, b2, 1.0 / m2]))
    elif f.name.startswith("multi_step_"):
        out.extend(_step_guesses(x, n, int(f.name.rsplit("_", 1)[1])))
    else:  # a form registered later without its own guesses: data-scale defaults
        default = {"amount": n_top, "affinity": float(np.exp(-np.mean(x)))}
        base = [default.get(kind, 1.0) for kind in f.kinds]
        out.append(np.array(base))
    return out


def _step_guesses(x: np.ndarray, n: np.ndarray, k_steps: int) -> list[np.ndarray]:
    """Starting points for a K-step form [n_1, b_1, (n_k, b_k, m_k) k=2..K].

    Segment the data in ln p around the steepest rises (local maxima of the secant slope) and
    around equal fractions of the total rise; for each segmentation the step-1 (Langmuir) role
    is given to the broadest segment and to the first one.
    """
    n_top = float(np.max(n))
    dx = np.diff(x)
    slope = np.diff(n) / dx
    mid = 0.5 * (x[1:] + x[:-1])
    peaks = [
        i
        for i in range(slope.size)
        if slope[i] > 0.0
        and (i == 0 or slope[i] >= slope[i - 1])
        and (i == slope.size - 1 or slope[i] >= slope[i + 1])
    ]
    segmentations: list[list[tuple[float, float, float]]] = []  # (amount, centre, m)

    def from_boundaries(bounds_x: list[float]) -> list[tuple[float, float, float]]:
        edges = [-np.inf, *bounds_x, np.inf]
        segs = []
        for a, b in zip(edges[:-1], edges[1:], strict=True):
            lo_n = 0.0 if not np.isfinite(a) else float(np.interp(a, x, n))
            hi_n = float(np.interp(b, x, n)) if np.isfinite(b) else n_top
            amount = max(hi_n - lo_n, 0.05 * n_top)
            centre = _x_at_fraction(x, n, 0.5 * (lo_n + hi_n))
            inside = (mid > a) & (mid < b)
            s_max = float(np.max(slope[inside])) if np.any(inside) else 0.0
            m = float(np.clip(4.0 * s_max / amount, *_forms.STEP_M_RANGE))
            segs.append((amount, centre, m))
        return segs

    if len(peaks) >= k_steps:
        top = sorted(sorted(peaks, key=lambda i: -slope[i])[:k_steps])
        bx = []
        for a, b in zip(top[:-1], top[1:], strict=True):
            j = a + int(np.argmin(slope[a : b + 1]))
            bx.append(float(x[j + 1]) if j + 1 < x.size else float(mid[j]))
        segmentations.append(from_boundaries(bx))
    fractions = [k / k_steps for k in range(1, k_steps)]
    segmentations.append(from_boundaries([_x_at_fraction(x, n, fr * n_top) for fr in fractions]))

    out: list[np.ndarray] = []
    seen: set[tuple[float, ...]] = set()
    for segs in segmentations:
        broadest = int(np.argmin([s[2] for s in segs]))
        for first in sorted({broadest, 0}):
            order = [first] + [i for i in range(k_steps) if i != first]
            par: list[float] = []
            for rank, i in enumerate(order):
                amount, centre, m = segs[i]
                b = float(np.exp(-centre))
                par += [amount, b] if rank == 0 else [amount, b, max(m, 1.0)]
            key = tuple(np.round(np.log(par), 6))
            if key not in seen:
                seen.add(key)
                out.append(np.array(par))
    return out


def _canonical(f: Form, theta: np.ndarray) -> np.ndarray:
    """Permutation putting a multi-step form's steps 2..K in order of decreasing b_k."""
    idx = np.arange(theta.size)
    if f.name.startswith("multi_step_"):
        k = (theta.size - 2) // 3
        order = np.argsort(-theta[3::3][:k], kind="stable")
        idx = np.concatenate([[0, 1], *[np.arange(2 + 3 * j, 5 + 3 * j) for j in order]])
    return idx


# --------------------------------------------------------------------------------------------
# fitting
# --------------------------------------------------------------------------------------------
def _aicc(chi2: float, k: int, n_points: int) -> float:
    if n_points - k - 1 <= 0:
        return math.inf
    return chi2 + 2.0 * k + 2.0 * k * (k + 1) / (n_points - k - 1)


def _bic(chi2: float, k: int, n_points: int) -> float:
    return chi2 + k * math.log(n_points)


def _failed(name: str, p: np.ndarray, k: int, n_points: int) -> FitResult:
    nan = float("nan")
    return FitResult(
        form=name,
        parameters=np.full(k, nan),
        covariance=np.full((k, k), nan),
        chi2=nan,
        dof=n_points - k,
        reduced_chi2=nan,
        p_value=nan,
        aicc=nan,
        residuals=np.full(n_points, nan),
        accepted=False,
        candidates=((name, nan, nan, False),),
        p_range=(float(p[0]), float(p[-1])),
    )


def fit_form(
    form_name: str,
    p: np.ndarray,
    n: np.ndarray,
    stderr: np.ndarray,
    *,
    p_value_min: float = 1e-3,
) -> FitResult:
    """Weighted least-squares fit of one registered form.

    scipy.optimize.least_squares (trust-region reflective, bounds) on transformed parameters:
    amounts, affinities and positive shape exponents on a log scale, Hill-de Boer c on a linear
    scale; several data-derived starting points, the lowest chi2 kept. The covariance is the
    unscaled (J^T J)^-1 in the natural parameters (module docstring); NaN if J is rank
    deficient, in which case the fit is not accepted.
    """
    p, n, s_in = _check_data(p, n, stderr)
    f = _forms.form(form_name)
    if not np.any(n > 0.0):
        raise InputError("n: all densities are zero; such an isotherm has the form 'zero'")
    sigma = effective_stderr(n, s_in)
    k, n_points = f.n_parameters, p.size
    lo, hi = _bounds(f, p, n)
    z_lo, z_hi = _to_z(f, lo), _to_z(f, hi)
    span = z_hi - z_lo
    z_lo_in, z_hi_in = z_lo + 1e-9 * span, z_hi - 1e-9 * span

    log_scale = np.array(f.log_scale)

    def residual(z: np.ndarray) -> np.ndarray:
        with np.errstate(over="ignore", invalid="ignore", under="ignore"):
            model = f.evaluate(_from_z(f, z), p)
        r = (model - n) / sigma
        return np.where(np.isfinite(r), r, 1e10)

    def jacobian(z: np.ndarray) -> np.ndarray:
        """d r / d z, analytic: (d n / d theta)(d theta / d z)/sigma."""
        theta = _from_z(f, z)
        with np.errstate(over="ignore", invalid="ignore", under="ignore"):
            g = f.gradient(theta, p) * np.where(log_scale, theta, 1.0) / sigma[:, None]
        return np.where(np.isfinite(g), g, 0.0)

    # starts in order of their initial chi2; stop once the best minimum has been reached from
    # two different starts (or the starts are exhausted)
    starts = [np.clip(_to_z(f, np.clip(g, lo, hi)), z_lo_in, z_hi_in) for g in _guesses(f, p, n)]
    starts.sort(key=lambda z0: float(np.sum(residual(z0) ** 2)))
    best = None
    costs: list[float] = []
    for z0 in starts:
        try:
            sol = optimize.least_squares(
                residual,
                z0,
                jac=jacobian,
                bounds=(z_lo, z_hi),
                method="trf",
                xtol=1e-8,
                ftol=1e-9,
                gtol=1e-8,
                max_nfev=_MAX_NFEV,
            )
        except (ValueError, np.linalg.LinAlgError):
            continue
        if not np.all(np.isfinite(sol.fun)):
            continue
        costs.append(float(sol.cost))
        if best is None or sol.cost < best.cost:
            best = sol
        if sum(c <= best.cost * (1.0 + 1e-7) + 1e-12 for c in costs) >= 2:
            break
    if best is None:
        return _failed(form_name, p, k, n_points)

    z = best.x
    perm = _canonical(f, _from_z(f, z))
    z = z[perm]
    theta = _from_z(f, z)
    lo, hi, z_lo, z_hi = lo[perm], hi[perm], z_lo[perm], z_hi[perm]
    r = residual(z)
    chi2 = float(r @ r)

    jac = jacobian(z)
    _, sv, vt = np.linalg.svd(jac, full_matrices=False)
    full_rank = bool(np.all(np.isfinite(sv)) and sv[-1] > _RANK_RTOL * sv[0])
    if full_rank:
        cov_z = (vt.T / sv**2) @ vt
        dtheta = np.where(log_scale, theta, 1.0)  # d theta / d z
        cov = cov_z * np.outer(dtheta, dtheta)
    else:
        cov = np.full((k, k), np.nan)

    names = [f.parameter_names[i] for i in range(k)]
    tol = 1e-6 * np.maximum(1.0, np.abs(z_hi - z_lo))
    at_bound = tuple(
        names[i] for i in range(k) if z[i] - z_lo[i] < tol[i] or z_hi[i] - z[i] < tol[i]
    )
    dof = n_points - k
    red = chi2 / dof if dof > 0 else float("nan")
    pval = float(stats.chi2.sf(chi2, dof)) if dof > 0 else float("nan")
    aicc = _aicc(chi2, k, n_points)
    accepted = bool(full_rank and dof > 0 and pval >= p_value_min)
    return FitResult(
        form=form_name,
        parameters=theta,
        covariance=cov,
        chi2=chi2,
        dof=dof,
        reduced_chi2=red,
        p_value=pval,
        aicc=aicc,
        residuals=-r,
        accepted=accepted,
        candidates=((form_name, red, aicc, accepted),),
        p_range=(float(p[0]), float(p[-1])),
        at_bound=at_bound,
    )


def isotonic_regression(y: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares non-decreasing fit (pool-adjacent-violators).

    Returns (fitted values, block id per point).
    """
    y = np.asarray(y, dtype=float)
    w = np.asarray(weights, dtype=float)
    values: list[float] = []
    wsum: list[float] = []
    count: list[int] = []
    for yi, wi in zip(y, w, strict=True):
        values.append(float(yi))
        wsum.append(float(wi))
        count.append(1)
        while len(values) > 1 and values[-2] > values[-1]:
            v2, w2, c2 = values.pop(), wsum.pop(), count.pop()
            v1, w1, c1 = values.pop(), wsum.pop(), count.pop()
            values.append((v1 * w1 + v2 * w2) / (w1 + w2))
            wsum.append(w1 + w2)
            count.append(c1 + c2)
    fitted = np.repeat(values, count)
    blocks = np.repeat(np.arange(len(values)), count)
    return fitted, blocks


def _zero_result(p: np.ndarray) -> FitResult:
    return FitResult(
        form=ZERO_FORM,
        parameters=np.empty(0),
        covariance=np.empty((0, 0)),
        chi2=0.0,
        dof=int(p.size),
        reduced_chi2=0.0,
        p_value=1.0,
        aicc=0.0,
        residuals=np.zeros(p.size),
        accepted=True,
        candidates=((ZERO_FORM, 0.0, 0.0, True),),
        p_range=(float(p[0]), float(p[-1])),
    )


def _interpolant_result(
    p: np.ndarray,
    n: np.ndarray,
    sigma: np.ndarray,
    candidates: tuple[tuple[str, float, float, bool], ...],
) -> FitResult:
    w = 1.0 / sigma**2
    fitted, blocks = isotonic_regression(n, w)
    k = p.size
    params = _forms.pack_interpolant(p, fitted)
    cov = np.zeros((3 * k, 3 * k))
    block_var = np.array([1.0 / w[blocks == b].sum() for b in blocks])
    cov[k : 2 * k, k : 2 * k] = np.diag(block_var)
    cov[2 * k :, :] = np.nan
    cov[:, 2 * k :] = np.nan
    r = (n - fitted) / sigma
    chi2 = float(r @ r)
    dof = int(k - (blocks[-1] + 1))
    red = chi2 / dof if dof > 0 else float("nan")
    pval = float(stats.chi2.sf(chi2, dof)) if dof > 0 else float("nan")
    return FitResult(
        form=INTERPOLANT_FORM,
        parameters=params,
        covariance=cov,
        chi2=chi2,
        dof=dof,
        reduced_chi2=red,
        p_value=pval,
        aicc=float("nan"),
        residuals=r,
        accepted=False,
        candidates=candidates,
        p_range=(float(p[0]), float(p[-1])),
    )


def fit_isotherm(
    p: np.ndarray,
    n: np.ndarray,
    stderr: np.ndarray,
    forms: tuple[str, ...] = DEFAULT_FORMS,
    criterion: str = "aicc",
    p_value_min: float = 1e-3,
) -> FitResult:
    """Fit every candidate form, keep those accepted (chi2 p-value >= p_value_min, full-rank
    Jacobian) and return the one with the lowest AICc (``criterion="aicc"``) or BIC
    (``"bic"``); the returned ``candidates`` lists every form tried. If none is accepted the
    result is the monotone interpolant (``accepted=False``); an isotherm that is zero at every
    point gives the form ``"zero"``.
    """
    p, n, s_in = _check_data(p, n, stderr)
    if criterion not in ("aicc", "bic"):
        raise InputError(f"criterion: must be 'aicc' or 'bic', got {criterion!r}")
    if not 0.0 <= p_value_min < 1.0:
        raise InputError(f"p_value_min: must lie in [0, 1), got {p_value_min}")
    if len(forms) == 0:
        raise InputError("forms: at least one candidate form is needed")
    for name in forms:
        _forms.form(name)
    if not np.any(n > 0.0):
        return _zero_result(p)

    results = [fit_form(name, p, n, s_in, p_value_min=p_value_min) for name in forms]
    candidates = tuple(r.candidates[0] for r in results)

    def score(r: FitResult) -> float:
        if criterion == "aicc":
            return r.aicc
        return _bic(r.chi2, r.parameters.size, p.size)

    accepted = [r for r in results if r.accepted]
    if not accepted:
        return _interpolant_result(p, n, effective_stderr(n, s_in), candidates)
    best = min(accepted, key=score)
    return FitResult(
        form=best.form,
        parameters=best.parameters,
        covariance=best.covariance,
        chi2=best.chi2,
        dof=best.dof,
        reduced_chi2=best.reduced_chi2,
        p_value=best.p_value,
        aicc=best.aicc,
        residuals=best.residuals,
        accepted=True,
        candidates=candidates,
        p_range=best.p_range,
        at_bound=best.at_bound,
    )


def evaluate(
    result: FitResult,
    p: np.ndarray | float,
    *,
    above: str = "clamp",
    below: str = "form",
    henry_constant: float | None = None,
) -> np.ndarray:
    """Evaluate a fit at pressures p (Pa); policies as in :func:`gcmc.kernel.forms.evaluate_fit`,
    with the simulated range taken from ``result.p_range``."""
    return _forms.evaluate_fit(
        result.form,
        result.parameters,
        p,
        p_low=result.p_range[0],
        p_high=result.p_range[1],
        above=above,
        below=below,
        henry_constant=henry_constant,
    )


__all__ = [
    "DEFAULT_FORMS",
    "FORMS",
    "FitResult",
    "effective_stderr",
    "evaluate",
    "fit_form",
    "fit_isotherm",
    "isotonic_regression",
]
