"""Correlating forms for single-pore isotherms, and how a stored fit is evaluated.

This module needs numpy only: the kernel reader imports it, and downstream inversion codes
use the reader with numpy and h5py alone. Fitting (scipy) lives in :mod:`gcmc.pipeline.fits`.

Quantities: absolute density ``n`` in molecules/nm^3 of pore volume, pressure ``p`` in Pa,
affinities ``b`` in 1/Pa, Henry constants ``K_H`` in molecules/nm^3/Pa.

What is here
------------
* :data:`FORMS`, a registry ``name -> Form`` of the published correlating forms;
* :func:`hill_de_boer_coverage`, the vectorised implicit solve of the Hill-de Boer equation;
* :func:`pchip_slopes`, :func:`pchip_evaluate`, :func:`monotone_interpolant`: a numpy
  shape-preserving monotone piecewise-cubic Hermite interpolant, used in ln p as the
  model-free fallback when no form passes the goodness-of-fit test;
* :func:`henry_extension`, the low-pressure continuation below the lowest simulated pressure;
* :func:`evaluate_fit`, which evaluates a stored (form name, parameters) pair with explicit
  policies below the lowest and above the highest simulated pressure.

Two pseudo-forms are understood by :func:`evaluate_fit` besides the registry: ``"zero"``
(a pore too narrow to admit the probe: n = 0 at every pressure, no parameters) and
``"monotone_interpolant"`` (parameters packed by :func:`pack_interpolant`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from gcmc.errors import InputError

#: Hill-de Boer: theta(p) is single valued for 0 <= c <= 27/4 (see :func:`hill_de_boer_coverage`).
HILL_DE_BOER_C_MAX = 27.0 / 4.0

ZERO_FORM = "zero"
INTERPOLANT_FORM = "monotone_interpolant"

#: Shape-parameter ranges used by the fitter (dimensionless).  They are generous bounds that
#: keep the optimiser in the region where the forms are numerically well behaved; they are
#: not physics.  A fitted value at one of these bounds is reported by the fitter.
SIPS_S_RANGE = (0.02, 50.0)
TOTH_T_RANGE = (0.02, 50.0)
STEP_M_RANGE = (1.0, 100.0)


# --------------------------------------------------------------------------------------------
# small numerical helpers
# --------------------------------------------------------------------------------------------
def _expit(z: np.ndarray) -> np.ndarray:
    """Logistic 1/(1+exp(-z)) with full relative precision in both tails."""
    z = np.asarray(z, dtype=float)
    e = np.exp(-np.abs(z))
    return np.where(z >= 0.0, 1.0 / (1.0 + e), e / (1.0 + e))


def _log_bp(b: float, p: np.ndarray) -> np.ndarray:
    """ln(b p) computed as ln b + ln p (no overflow); -inf where p == 0."""
    with np.errstate(divide="ignore"):
        return np.log(b) + np.log(p)


def _logistic_step(amount: float, b: float, m: float, p: np.ndarray) -> np.ndarray:
    """amount * (b p)^m / (1 + (b p)^m), a logistic step in ln p centred at p = 1/b."""
    return amount * _expit(m * _log_bp(b, p))


def _logistic_step_gradient(amount: float, b: float, m: float, p: np.ndarray) -> np.ndarray:
    """d step / d(amount, b, m), shape p.shape + (3,)."""
    u = _log_bp(b, p)
    z = m * u
    e = np.exp(-np.abs(z))
    sig = np.where(z >= 0.0, 1.0 / (1.0 + e), e / (1.0 + e))
    s1s = e / (1.0 + e) ** 2  # sigma (1 - sigma), exact in both tails
    with np.errstate(invalid="ignore"):
        d_m = np.where(s1s > 0.0, amount * s1s * u, 0.0)
    return np.stack([sig, amount * s1s * m / b, d_m], axis=-1)


# --------------------------------------------------------------------------------------------
# the forms
# --------------------------------------------------------------------------------------------
def _langmuir(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n_m, b = params
    bp = b * p
    return n_m * bp / (1.0 + bp)


def _langmuir_gradient(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n_m, b = params
    bp = b * p
    return np.stack([bp / (1.0 + bp), n_m * p / (1.0 + bp) ** 2], axis=-1)


def _langmuir_henry(params: np.ndarray) -> float:
    return float(params[0] * params[1])


def _sips(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n_m, b, s = params
    return _logistic_step(n_m, b, 1.0 / s, p)


def _sips_gradient(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n_m, b, s = params
    g = _logistic_step_gradient(n_m, b, 1.0 / s, p)
    g[..., 2] *= -1.0 / s**2
    return g


def _sips_henry(params: np.ndarray) -> float:
    n_m, b, s = params
    if s == 1.0:
        return float(n_m * b)
    # n ~ n_m (b p)^(1/s): zero initial slope for s < 1, infinite for s > 1
    return 0.0 if s < 1.0 else float("inf")


def _toth(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n_m, b, t = params
    u = _log_bp(b, p)
    # n_m b p / (1 + (b p)^t)^(1/t) = n_m exp(u - ln(1 + e^(t u))/t), overflow-free
    return n_m * np.exp(u - np.logaddexp(0.0, t * u) / t)


def _toth_gradient(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n_m, b, t = params
    u = _log_bp(b, p)
    big_l = np.logaddexp(0.0, t * u)
    frac = np.exp(u - big_l / t)  # n / n_m
    sig = _expit(t * u)
    with np.errstate(invalid="ignore"):
        d_t = np.where(frac > 0.0, n_m * frac * (big_l / t**2 - u * sig / t), 0.0)
    return np.stack([frac, n_m * frac * (1.0 - sig) / b, d_t], axis=-1)


def _dsls(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n1, b1, n2, b2, s = params
    return _langmuir(np.array([n1, b1]), p) + _sips(np.array([n2, b2, s]), p)


def _dsls_gradient(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n1, b1, n2, b2, s = params
    return np.concatenate(
        [_langmuir_gradient(np.array([n1, b1]), p), _sips_gradient(np.array([n2, b2, s]), p)],
        axis=-1,
    )


def _dsls_henry(params: np.ndarray) -> float:
    n1, b1, n2, b2, s = params
    return float(n1 * b1) + _sips_henry(np.array([n2, b2, s]))


def _hill_de_boer(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    n_m, b, c = params
    return n_m * hill_de_boer_coverage(b * np.asarray(p, dtype=float), c)


def _hill_de_boer_gradient(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    # implicit differentiation of g(y) = y + e^y - c theta - ln b - ln p = 0 with
    # y = logit theta: d theta/d ln b = theta (1-theta)^2 / (1 - c theta (1-theta)^2)
    n_m, b, c = params
    th = hill_de_boer_coverage(b * np.asarray(p, dtype=float), c)
    w = th * (1.0 - th) ** 2
    dth = w / (1.0 - c * w)
    return np.stack([th, n_m * dth / b, n_m * dth * th], axis=-1)


def _multi_step(k_steps: int) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    def evaluate(params: np.ndarray, p: np.ndarray) -> np.ndarray:
        n1, b1 = params[0], params[1]
        out = _langmuir(np.array([n1, b1]), p)
        for k in range(k_steps - 1):
            n_k, b_k, m_k = params[2 + 3 * k : 5 + 3 * k]
            out = out + _logistic_step(n_k, b_k, m_k, p)
        return out

    return evaluate


def _multi_step_gradient(params: np.ndarray, p: np.ndarray) -> np.ndarray:
    parts = [_langmuir_gradient(params[:2], p)]
    for k in range((len(params) - 2) // 3):
        parts.append(_logistic_step_gradient(*params[2 + 3 * k : 5 + 3 * k], p))
    return np.concatenate(parts, axis=-1)


def _multi_step_henry(params: np.ndarray) -> float:
    total = float(params[0] * params[1])
    for k in range((len(params) - 2) // 3):
        n_k, b_k, m_k = params[2 + 3 * k : 5 + 3 * k]
        if m_k == 1.0:
            total += float(n_k * b_k)
        elif m_k < 1.0:
            return float("inf")
    return total


@dataclass(frozen=True)
class Form:
    """A correlating form n(p; parameters).

    ``kinds`` gives each parameter's role: ``"amount"`` (molecules/nm^3, > 0),
    ``"affinity"`` (1/Pa, > 0), or ``"shape"`` (dimensionless, inside ``shape_bounds``).
    Amounts, affinities and the shape parameters with ``log_scale`` True are fitted on a log
    scale; the others on a linear scale. ``evaluate(params, p)`` is vectorised over p;
    ``gradient(params, p)`` returns dn/d(params) with shape p.shape + (k,) (used by the fitter
    and, with the stored covariance, for the uncertainty of n(p): var n = g C g^T).
    """

    name: str
    parameter_names: tuple[str, ...]
    kinds: tuple[str, ...]
    evaluate: Callable[[np.ndarray, np.ndarray], np.ndarray]
    gradient: Callable[[np.ndarray, np.ndarray], np.ndarray]
    henry: Callable[[np.ndarray], float]
    equation: str
    reference: str
    shape_bounds: tuple[tuple[float, float] | None, ...]
    log_scale: tuple[bool, ...]

    @property
    def n_parameters(self) -> int:
        """Number of parameters of the form."""
        return len(self.parameter_names)

    def check_parameters(self, parameters: np.ndarray | list[float]) -> np.ndarray:
        """Return the parameters as a float array, or raise InputError naming the problem."""
        par = np.asarray(parameters, dtype=float)
        if par.shape != (self.n_parameters,):
            raise InputError(
                f"parameters: form {self.name!r} takes {self.n_parameters} parameters "
                f"{self.parameter_names}, got shape {par.shape}"
            )
        if not np.all(np.isfinite(par)):
            raise InputError(f"parameters: form {self.name!r} has a non-finite parameter")
        for name, kind, value in zip(self.parameter_names, self.kinds, par, strict=True):
            if kind in ("amount", "affinity") and value <= 0.0:
                raise InputError(f"parameters: {self.name} {name} must be > 0, got {value}")
        if self.name == "hill_de_boer" and not 0.0 <= par[2] <= HILL_DE_BOER_C_MAX:
            raise InputError(
                f"parameters: hill_de_boer c must lie in [0, 27/4] (single-valued branch), "
                f"got {par[2]}"
            )
        if self.name in ("sips", "toth", "dual_site_langmuir_sips") and par[-1] <= 0.0:
            raise InputError(f"parameters: {self.name} {self.parameter_names[-1]} must be > 0")
        if self.name.startswith("multi_step"):
            m = par[4::3]
            if np.any(m < 1.0):
                raise InputError(f"parameters: {self.name} step exponents m_k must be >= 1")
        return par

    def henry_constant(self, parameters: np.ndarray) -> float:
        """lim_{p->0} n/p of the form (molecules/nm^3/Pa); 0 or inf where the form has no
        Henry law (Sips with s != 1)."""
        return self.henry(self.check_parameters(parameters))


def _multi_step_form(k_steps: int) -> Form:
    names: list[str] = ["n_1", "b_1"]
    kinds: list[str] = ["amount", "affinity"]
    for k in range(2, k_steps + 1):
        names += [f"n_{k}", f"b_{k}", f"m_{k}"]
        kinds += ["amount", "affinity", "shape"]
    shape_bounds = tuple(STEP_M_RANGE if kd == "shape" else None for kd in kinds)
    return Form(
        name=f"multi_step_{k_steps}",
        parameter_names=tuple(names),
        kinds=tuple(kinds),
        evaluate=_multi_step(k_steps),
        gradient=_multi_step_gradient,
        henry=_multi_step_henry,
        equation=(
            "n = n_1 b_1 p/(1 + b_1 p) + sum_{k=2..K} n_k (b_k p)^m_k/(1 + (b_k p)^m_k), "
            f"K = {k_steps}, m_k >= 1"
        ),
        reference=(
            "Sum of logistic steps in ln p (each step a Sips-type term, J. Chem. Phys. 16 (1948) "
            "490, with exponent m = 1/s); step 1 is a Langmuir term (J. Am. Chem. Soc. 40 (1918) "
            "1361); project design for layering and pore filling"
        ),
        shape_bounds=shape_bounds,
        log_scale=tuple(True for _ in kinds),
    )


FORMS: dict[str, Form] = {
    "langmuir": Form(
        name="langmuir",
        parameter_names=("n_m", "b"),
        kinds=("amount", "affinity"),
        evaluate=_langmuir,
        gradient=_langmuir_gradient,
        henry=_langmuir_henry,
        equation="n = n_m b p / (1 + b p)",
        reference="I. Langmuir, J. Am. Chem. Soc. 40 (1918) 1361",
        shape_bounds=(None, None),
        log_scale=(True, True),
    ),
    "sips": Form(
        name="sips",
        parameter_names=("n_m", "b", "s"),
        kinds=("amount", "affinity", "shape"),
        evaluate=_sips,
        gradient=_sips_gradient,
        henry=_sips_henry,
        equation="n = n_m (b p)^(1/s) / (1 + (b p)^(1/s))",
        reference="R. Sips, J. Chem. Phys. 16 (1948) 490",
        shape_bounds=(None, None, SIPS_S_RANGE),
        log_scale=(True, True, True),
    ),
    "toth": Form(
        name="toth",
        parameter_names=("n_m", "b", "t"),
        kinds=("amount", "affinity", "shape"),
        evaluate=_toth,
        gradient=_toth_gradient,
        henry=_langmuir_henry,
        equation="n = n_m b p / (1 + (b p)^t)^(1/t)",
        reference="J. Toth, Acta Chim. Acad. Sci. Hung. 69 (1971) 311",
        shape_bounds=(None, None, TOTH_T_RANGE),
        log_scale=(True, True, True),
    ),
    "dual_site_langmuir_sips": Form(
        name="dual_site_langmuir_sips",
        parameter_names=("n_1", "b_1", "n_2", "b_2", "s"),
        kinds=("amount", "affinity", "amount", "affinity", "shape"),
        evaluate=_dsls,
        gradient=_dsls_gradient,
        henry=_dsls_henry,
        equation="n = n_1 b_1 p/(1 + b_1 p) + n_2 (b_2 p)^(1/s)/(1 + (b_2 p)^(1/s))",
        reference=(
            "Langmuir site (J. Am. Chem. Soc. 40 (1918) 1361) plus Sips site "
            "(J. Chem. Phys. 16 (1948) 490)"
        ),
        shape_bounds=(None, None, None, None, SIPS_S_RANGE),
        log_scale=(True, True, True, True, True),
    ),
    "hill_de_boer": Form(
        name="hill_de_boer",
        parameter_names=("n_m", "b", "c"),
        kinds=("amount", "affinity", "shape"),
        evaluate=_hill_de_boer,
        gradient=_hill_de_boer_gradient,
        henry=_langmuir_henry,
        equation=(
            "b p = [theta/(1-theta)] exp[theta/(1-theta) - c theta], n = n_m theta, 0 <= c <= 27/4"
        ),
        reference=(
            "T.L. Hill, J. Chem. Phys. 14 (1946) 441; J.H. de Boer, The Dynamical Character "
            "of Adsorption (Oxford, 1953)"
        ),
        shape_bounds=(None, None, (0.0, HILL_DE_BOER_C_MAX)),
        log_scale=(True, True, False),
    ),
    "multi_step_2": _multi_step_form(2),
    "multi_step_3": _multi_step_form(3),
}
"""Registry of correlating forms.

Notes on the design choices:

* ``hill_de_boer``: the mobile-monolayer equation with a 2-D van der Waals lateral term
  c = 2a/(beta_2 k T). d ln(bp)/d theta = 1/(theta (1-theta)^2) - c, whose minimum over theta
  is 27/4 at theta = 1/3; so theta(p) is single valued (monotone) exactly for c <= 27/4. Above
  that the equation has a van der Waals loop (2-D condensation) and needs an equal-area
  construction, which this form does not attempt: c is restricted to [0, 27/4]. c = 0 is the
  Volmer equation.
* ``multi_step_K`` (K = 2, 3): step 1 has its exponent fixed to 1 (a Langmuir term) and the
  other steps have m_k >= 1, so every multi-step fit has a finite Henry law,
  K_H = n_1 b_1 (+ n_k b_k for any step with m_k exactly 1), as the exact low-pressure limit of
  a single-pore isotherm requires. The K = 1 member would be ``langmuir`` and is not
  duplicated. Steps 2..K are interchangeable; the fitter stores them in order of decreasing
  b_k (increasing step pressure 1/b_k).
* ``dual_site_langmuir_sips`` is the same family as ``multi_step_2`` with m = 1/s, but without
  the bound s <= 1; for s > 1 it has an infinite initial slope (no Henry law). The fitter's
  default candidate list therefore uses ``multi_step_2``; this form can be requested by name.
* ``sips`` has no Henry law unless s = 1 (slope 0 for s < 1, infinite for s > 1); it is kept
  because it is the published form; below the simulated range use the Henry extension.
"""


#: default candidate list for :func:`gcmc.pipeline.fits.fit_isotherm` (see FORMS above for why
#: dual_site_langmuir_sips is not in it)
DEFAULT_FORMS: tuple[str, ...] = (
    "langmuir",
    "sips",
    "toth",
    "hill_de_boer",
    "multi_step_2",
    "multi_step_3",
)


def form(name: str) -> Form:
    """Look up a registered form or raise InputError naming it."""
    try:
        return FORMS[name]
    except KeyError:
        raise InputError(
            f"form: unknown correlating form {name!r}; known: {', '.join(FORMS)}"
        ) from None


# --------------------------------------------------------------------------------------------
# Hill-de Boer implicit solve
# --------------------------------------------------------------------------------------------
def _inverse_bracket(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bounds on the root y of y + e^y = v (h(y) = y + e^y is increasing).

    v < 1: h(v - 1) <= v <= h(v);  v >= 1: h(ln(v/2)) <= v <= h(ln v).
    """
    vv = np.maximum(v, 1.0)
    lo = np.where(v < 1.0, v - 1.0, np.log(vv / 2.0))
    hi = np.where(v < 1.0, v, np.log(vv))
    return lo, hi


def hill_de_boer_coverage(bp: np.ndarray | float, c: float) -> np.ndarray:
    """Fractional coverage theta solving b p = [theta/(1-theta)] exp[theta/(1-theta) - c theta].

    Works in y = ln[theta/(1-theta)], where the equation reads
    g(y) = y + e^y - c theta(y) - ln(b p) = 0 with g'(y) = 1 + e^y - c theta (1-theta) >= 0 for
    c <= 27/4, so the root is unique. Since 0 <= c theta <= c the root lies in
    [h^-1(ln bp), h^-1(ln bp + c)] with h(y) = y + e^y; a vectorised Newton iteration is
    safeguarded by bisection inside that bracket. Converges to |dy| < 1e-14 (|d theta| <
    ~3e-15), except next to the critical point c = 27/4, theta = 1/3, where g has a triple root
    and the attainable accuracy in theta is limited by conditioning (the residual of the
    defining equation still reaches rounding level).

    Negative c (repulsive lateral interaction) is accepted by the solver (the bracket is then
    [h^-1(ln bp + c), h^-1(ln bp)]); c > 27/4 is refused.
    """
    c = float(c)
    if not np.isfinite(c) or c > HILL_DE_BOER_C_MAX:
        raise InputError(
            f"c: Hill-de Boer lateral constant must be <= 27/4 for a single-valued isotherm, "
            f"got {c}"
        )
    bp = np.asarray(bp, dtype=float)
    theta = np.zeros(bp.shape)
    theta[np.isposinf(bp)] = 1.0
    pos = (bp > 0.0) & np.isfinite(bp)
    if not np.any(pos):
        return theta
    u = np.log(bp[pos])
    lo, _ = _inverse_bracket(u + min(c, 0.0))
    _, hi = _inverse_bracket(u + max(c, 0.0))
    # start from the bracket midpoint; Newton steps that leave the bracket are bisections
    y = np.clip(0.5 * (lo + hi), lo, hi)
    active = np.ones(y.shape, dtype=bool)
    for _ in range(200):
        th = _expit(y)
        ey = np.exp(y)
        g = y + ey - c * th - u
        dg = 1.0 + ey - c * th * (1.0 - th)
        lo = np.where(g < 0.0, y, lo)
        hi = np.where(g > 0.0, y, hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            y_newton = y - g / dg
        ok = (dg > 0.0) & (y_newton >= lo) & (y_newton <= hi)
        y_new = np.where(ok, y_newton, 0.5 * (lo + hi))
        y_new = np.where(g == 0.0, y, y_new)
        step = np.abs(y_new - y)
        y = np.where(active, y_new, y)
        active &= (step > 1e-14 * np.maximum(1.0, np.abs(y))) & (hi - lo > 0.0)
        if not np.any(active):
            break
    theta[pos] = _expit(y)
    return theta


# --------------------------------------------------------------------------------------------
# monotone piecewise-cubic Hermite interpolation
# --------------------------------------------------------------------------------------------
def _check_knots(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.ndim != 1 or x.shape != y.shape or x.size < 2:
        raise InputError("knots: x and y must be 1-D arrays of the same length >= 2")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise InputError("knots: x and y must be finite")
    if np.any(np.diff(x) <= 0.0):
        raise InputError("knots: x must be strictly increasing")
    return x, y


def _edge_slope(h0: float, h1: float, m0: float, m1: float) -> float:
    """One-sided three-point end slope, limited to preserve shape."""
    d = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
    if np.sign(d) != np.sign(m0):
        return 0.0
    if np.sign(m0) != np.sign(m1) and abs(d) > 3.0 * abs(m0):
        return 3.0 * m0
    return float(d)


def pchip_slopes(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Knot slopes of the shape-preserving piecewise-cubic Hermite interpolant.

    Interior knots: zero where the adjacent secant slopes m_{k-1}, m_k differ in sign or one is
    zero (a local extremum stays an extremum); otherwise the weighted harmonic mean
    1/d_k = (w1/m_{k-1} + w2/m_k)/(w1 + w2), w1 = 2h_k + h_{k-1}, w2 = h_k + 2h_{k-1}
    (Fritsch & Butland, SIAM J. Sci. Stat. Comput. 5 (1984) 300), which satisfies the
    monotonicity conditions of Fritsch & Carlson, SIAM J. Numer. Anal. 17 (1980) 238.
    End knots: the one-sided three-point formula, set to 0 if its sign differs from the end
    secant and limited to 3x the end secant where the data turn (the end rule of C. Moler,
    Numerical Computing with MATLAB, sec. 3.6). Two knots: the straight line. This is the
    scheme of scipy.interpolate.PchipInterpolator.
    """
    x, y = _check_knots(x, y)
    h = np.diff(x)
    m = np.diff(y) / h
    if x.size == 2:
        return np.array([m[0], m[0]])
    d = np.zeros_like(y)
    w1 = 2.0 * h[1:] + h[:-1]
    w2 = h[1:] + 2.0 * h[:-1]
    flat = (np.sign(m[1:]) != np.sign(m[:-1])) | (m[1:] == 0.0) | (m[:-1] == 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        whmean = (w1 / m[:-1] + w2 / m[1:]) / (w1 + w2)
        d[1:-1] = np.where(flat, 0.0, 1.0 / whmean)
    d[0] = _edge_slope(h[0], h[1], m[0], m[1])
    d[-1] = _edge_slope(h[-1], h[-2], m[-1], m[-2])
    return d


def pchip_evaluate(
    x: np.ndarray, y: np.ndarray, slopes: np.ndarray, xq: np.ndarray | float
) -> np.ndarray:
    """Evaluate the cubic Hermite interpolant with knot values y and knot slopes at xq.

    Vectorised over xq (any shape). Outside [x[0], x[-1]] the result is NaN: extrapolation is
    a policy decision left to :func:`evaluate_fit`.
    """
    x, y = _check_knots(x, y)
    d = np.asarray(slopes, dtype=float)
    if d.shape != x.shape:
        raise InputError("slopes: must have the same length as the knots")
    xq = np.asarray(xq, dtype=float)
    i = np.clip(np.searchsorted(x, xq, side="right") - 1, 0, x.size - 2)
    h = x[i + 1] - x[i]
    t = (xq - x[i]) / h
    t1 = 1.0 - t
    out = (
        y[i] * (1.0 + 2.0 * t) * t1 * t1
        + d[i] * h * t * t1 * t1
        + y[i + 1] * t * t * (3.0 - 2.0 * t)
        - d[i + 1] * h * t * t * t1
    )
    inside = (xq >= x[0]) & (xq <= x[-1])
    return np.where(inside, out, np.nan)


def monotone_interpolant(x: np.ndarray, y: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """The shape-preserving interpolant through (x, y) as a callable xq -> y(xq) (NaN outside
    the knot range). For isotherms, x = ln p."""
    x, y = _check_knots(x, y)
    d = pchip_slopes(x, y)
    return lambda xq: pchip_evaluate(x, y, d, xq)


def pack_interpolant(p: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Parameters of the ``monotone_interpolant`` pseudo-form: [ln p_1..K, n_1..K, d_1..K]
    with d the pchip slopes dn/d(ln p) at the knots (stored so a reader needs no refit)."""
    p = np.asarray(p, dtype=float)
    if np.any(~np.isfinite(p)) or np.any(p <= 0.0):
        raise InputError("p: knot pressures must be finite and > 0")
    x = np.log(p)
    y = np.asarray(n, dtype=float)
    return np.concatenate([x, y, pchip_slopes(x, y)])


def unpack_interpolant(parameters: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Inverse of :func:`pack_interpolant`: (x = ln p, n, slopes)."""
    par = np.asarray(parameters, dtype=float)
    if par.ndim != 1 or par.size < 6 or par.size % 3 != 0:
        raise InputError(
            "parameters: a monotone_interpolant needs 3K values (ln p, n, slopes), K >= 2"
        )
    k = par.size // 3
    x, y, d = par[:k], par[k : 2 * k], par[2 * k :]
    _check_knots(x, y)
    if not np.all(np.isfinite(d)):
        raise InputError("parameters: monotone_interpolant slopes must be finite")
    return x, y, d


# --------------------------------------------------------------------------------------------
# low- and high-pressure policies
# --------------------------------------------------------------------------------------------
def henry_extension(
    p: np.ndarray | float, p_low: float, n_low: float, henry_constant: float
) -> np.ndarray:
    """Continuation of an isotherm below its lowest simulated pressure p_low.

    n(p) = K_H p exp(c p) with c = ln[n_low / (K_H p_low)] / p_low.

    * n(p_low) = n_low exactly (continuous; the slope is in general not continuous);
    * n(p)/(K_H p) = exp(c p) -> 1 as p -> 0: the exact Henry law with the given K_H
      (molecules/nm^3/Pa), e.g. from quadrature of the Boltzmann factor of the wall potential;
    * |c p_low| = |ln[n_low/(K_H p_low)]| measures how far the lowest simulated point is from the
      Henry regime; the kernel builder should keep it small.

    Meant for 0 <= p <= p_low. If K_H = 0 and n_low = 0 (an inaccessible pore) the result is 0.
    """
    p = np.asarray(p, dtype=float)
    if not (np.isfinite(p_low) and p_low > 0.0):
        raise InputError(f"p_low: must be finite and > 0, got {p_low}")
    if not (np.isfinite(n_low) and n_low >= 0.0):
        raise InputError(f"n_low: must be finite and >= 0, got {n_low}")
    if not (np.isfinite(henry_constant) and henry_constant >= 0.0):
        raise InputError(f"henry_constant: must be finite and >= 0, got {henry_constant}")
    if henry_constant == 0.0 and n_low == 0.0:
        return np.zeros(p.shape)
    if henry_constant == 0.0 or n_low == 0.0:
        raise InputError(
            "henry_constant: K_H and n_low must both be > 0 (or both 0) for a Henry extension"
        )
    c = np.log(n_low / (henry_constant * p_low)) / p_low
    return henry_constant * p * np.exp(c * p)


def evaluate_fit(
    form_name: str,
    parameters: np.ndarray,
    p: np.ndarray | float,
    *,
    p_low: float | None = None,
    p_high: float | None = None,
    above: str = "clamp",
    below: str = "form",
    henry_constant: float | None = None,
) -> np.ndarray:
    """Evaluate a stored fit n(p) (molecules/nm^3) at pressures p (Pa, >= 0).

    ``p_low``/``p_high`` is the simulated pressure range; for ``monotone_interpolant`` they
    default to the first/last knot, for analytic forms None means "no limit on that side".

    Above p_high (``above``):
      * ``"clamp"``: hold the value at p_high (absolute loading in a pore saturates; the kernel
        file records that it was clamped);
      * ``"refuse"``: NaN.
    Below p_low (``below``):
      * ``"form"``: analytic forms are evaluated as they stand (all go to 0 at p = 0); the
        interpolant continues along the straight line n_low p/p_low through the origin;
      * ``"henry"``: :func:`henry_extension` with the given ``henry_constant`` and
        n_low = the fit's value at p_low;
      * ``"refuse"``: NaN.
    ``zero`` returns 0 everywhere.
    """
    if above not in ("clamp", "refuse"):
        raise InputError(f"above: must be 'clamp' or 'refuse', got {above!r}")
    if below not in ("form", "henry", "refuse"):
        raise InputError(f"below: must be 'form', 'henry' or 'refuse', got {below!r}")
    p = np.asarray(p, dtype=float)
    if np.any(~np.isfinite(p)) or np.any(p < 0.0):
        raise InputError("p: pressures must be finite and >= 0")
    if form_name == ZERO_FORM:
        if np.asarray(parameters).size != 0:
            raise InputError("parameters: the 'zero' form takes no parameters")
        return np.zeros(p.shape)

    if form_name == INTERPOLANT_FORM:
        x, y, d = unpack_interpolant(parameters)
        knots_low, knots_high = float(np.exp(x[0])), float(np.exp(x[-1]))
        p_low = knots_low if p_low is None else float(p_low)
        p_high = knots_high if p_high is None else float(p_high)
        if p_low < knots_low * (1 - 1e-12) or p_high > knots_high * (1 + 1e-12):
            raise InputError("p_low/p_high: outside the knots of the monotone_interpolant")

        def model(q: np.ndarray) -> np.ndarray:
            with np.errstate(divide="ignore"):
                xq = np.clip(np.log(q), x[0], x[-1])
            return pchip_evaluate(x, y, d, xq)

        def model_below(q: np.ndarray) -> np.ndarray:
            return model(np.array(p_low)) * q / p_low

    else:
        f = form(form_name)
        par = f.check_parameters(parameters)

        def model(q: np.ndarray) -> np.ndarray:
            return f.evaluate(par, q)

        model_below = model

    for name, value in (("p_low", p_low), ("p_high", p_high)):
        if value is not None and not (np.isfinite(value) and value > 0.0):
            raise InputError(f"{name}: must be finite and > 0, got {value}")
    if p_low is not None and p_high is not None and p_low > p_high:
        raise InputError("p_low: must not exceed p_high")

    q = p
    if p_high is not None:
        q = np.minimum(q, p_high)
    if p_low is not None:
        q = np.maximum(q, p_low)
    out = np.asarray(model(q), dtype=float)

    if p_high is not None and above == "refuse":
        out = np.where(p > p_high, np.nan, out)
    if p_low is not None:
        low = p < p_low
        if np.any(low):
            if below == "refuse":
                out = np.where(low, np.nan, out)
            elif below == "henry":
                if henry_constant is None:
                    raise InputError("henry_constant: required when below='henry'")
                n_low = float(model(np.array(p_low)))
                # evaluated at p <= p_low only: above it exp(c p) may overflow (c > 0 when the
                # lowest point already lies above the Henry line), and it is not used there
                ext = henry_extension(np.minimum(p, p_low), p_low, n_low, henry_constant)
                out = np.where(low, ext, out)
            else:
                out = np.where(low, model_below(p), out)
    elif below == "henry":
        raise InputError("p_low: required when below='henry'")
    return out


# --------------------------------------------------------------------------------------------
# the fitter's standard-error rule (gcmc.pipeline.fits, module docstring), shared with the
# quality checks
# --------------------------------------------------------------------------------------------
RELATIVE_STDERR_FLOOR = 1e-3
ABSOLUTE_STDERR_FLOOR = 1e-6  # times max |n|


def effective_stderr(n: np.ndarray, stderr: np.ndarray) -> np.ndarray:
    """The standard errors used as weights (the rule is in the module docstring)."""
    n = np.asarray(n, dtype=float)
    s = np.array(stderr, dtype=float)
    scale = float(np.max(np.abs(n))) if n.size else 0.0
    valid = np.isfinite(s) & (s > 0.0)
    if np.any(~valid) and np.any(valid):
        rel = valid & (n > 0.0)
        r_med = float(np.median(s[rel] / n[rel])) if np.any(rel) else 0.0
        s[~valid] = np.maximum(r_med * np.abs(n[~valid]), float(np.min(s[valid])))
    elif not np.any(valid):
        s[:] = 0.0
    floor = np.maximum(RELATIVE_STDERR_FLOOR * np.abs(n), ABSOLUTE_STDERR_FLOOR * scale)
    s = np.maximum(s, floor)
    if np.any(s <= 0.0):  # only when n == 0 everywhere and no error is given
        s = np.where(s > 0.0, s, np.finfo(float).tiny)
    return s
