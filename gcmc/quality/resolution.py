"""Resolving power of a kernel: how close two pore widths may be and still give isotherms that
an experiment with a given noise can tell apart.

Definitions (used by ``gcmc check``; all amounts per cm^3 of pore volume, mmol/cm^3)
-------------------------------------------------------------------------------------
Noise model (:class:`NoiseModel`): the standard deviation of a measured amount n is
    sigma(n) = sqrt((r n)^2 + a^2),
r relative, a absolute (mmol per cm^3 of pore volume: an absolute noise of the rig in mmol/g
divided by the sample's pore volume in cm^3/g). For the pore width w, sigma_i = sigma(K(p_i, w))
and, for a derivative D of the kernel, g_i = D(p_i, w) / sigma_i.

**Single-pore step dw_1(w).** A sample whose whole pore volume sits in pores of width w gives
the isotherm K(p_i, w); one with pores of width w + dw gives K(p_i, w + dw). The pore volume
of a sample is not known beforehand, so the second isotherm may be rescaled by any factor c:
    chi2_1(dw) = min_c sum_i [(c K(p_i, w + dw) - K(p_i, w)) / sigma_i]^2
               = dw^2 ||P1 g'||^2 + O(dw^3),
P1 the projector orthogonal to u = K / sigma and g' = (dK/dw) / sigma. dw_1 is the step at
which chi2_1 reaches the threshold Delta-chi2 (default 1, the one-standard-error criterion for
one parameter): dw_1 = sqrt(Delta-chi2) / ||P1 g'||. With the pore volume known instead,
dw_fixed = sqrt(Delta-chi2) / ||g'|| (reported too).

**Two-pore separation dw_2(w)** (a Rayleigh-type criterion). A pore-size *distribution* puts
volume at many widths at once, and a single-pore step is far too optimistic for it: in wide
pores K(p, w) ~ rho_bulk(p) + 2 Gamma(p)/w, so any mixture of wide pores is mimicked by a single
pore of the right width and volume. The question asked instead: can a pair of pores at
w - d and w + d (any volumes a, b) be told from one pore (any width w', any volume V)?
To second order in d, a K(w - d) + b K(w + d) = (a + b) K + (b - a) d K' + (a + b) d^2 K''/2,
and the single pore spans K and K'; what is left is the part of K'' orthogonal to both:
    chi2_2(d) = (d^2 / 2)^2 ||P2 g''||^2   (per unit pore volume, a + b = 1),
P2 the projector orthogonal to span{K/sigma, K'/sigma}, g'' = K''/sigma. dw_2 is the
half-separation d at which chi2_2 reaches Delta-chi2:
    dw_2 = (2 sqrt(Delta-chi2) / ||P2 g''||)^(1/2).

**Resolved widths.** A width counts as resolved when dw_2(w) <= rho w (default rho = 0.25: a
pair of pores at w (1 -+ 0.25) can be told from a single pore). The width above which pores
are no longer resolved is the crossing dw_2(w) = rho w above the widest resolved width
(interpolated between kernel widths in ln dw_2), or "none" when the widest kernel width is
resolved.

Derivatives come from the kernel's isotherms at its own widths: dK/dw by numpy.gradient
(second order: central in the interior, one-sided at the ends); d2K/dw2 by a least-squares
the three-point formula 2 [(K+ - K)/h+ - (K - K-)/h-] / (h+ + h-) in the interior, or, where
its noise from the kernel's own errors is as large as the curvature itself (a dense or uneven
width axis), a least-squares quadratic over the widths within 10 % of w; at the two end widths
dw_2 is extrapolated linearly in ln dw_2 from the two nearest interior widths. The kernel's own
statistical errors (of the stored fits, from their parameter covariance; of the points for the
model-free interpolant) inflate ||P2 g''||^2 by sum_i (1 - h_ii) var(g''_i) in expectation
(h_ii the diagonal of the projector onto span{K, K'}/sigma); that bias is subtracted (floored
at zero), so that a noisy kernel does not look sharper than it is.

Singular values: of the noise-weighted kernel matrix M_ij = K(p_i, w_j) / sigma_ref,i, where
sigma_ref is the noise of the isotherm of a reference sample with its pore volume spread evenly
over the kernel widths. A unit pore volume arranged as the j-th right singular vector (unit
norm over widths) gives a signal s_j noise units long, so the number of s_j >= 1 counts the
width patterns a measurement resolves.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from gcmc.errors import InputError
from gcmc.physics.units import MMOL_PER_CM3_PER_NM3

if TYPE_CHECKING:
    from gcmc.kernel.reader import Kernel

DEFAULT_RESOLUTION_FRACTION = 0.25
DEFAULT_CHI2_THRESHOLD = 1.0


@dataclass(frozen=True)
class NoiseModel:
    """sigma(n) = sqrt((relative n)^2 + absolute^2), n in mmol/cm^3 of pore volume."""

    relative: float = 0.01
    absolute_mmol_cm3: float = 0.01

    def __post_init__(self) -> None:
        for name, v in (
            ("noise relative", self.relative),
            ("noise absolute (mmol/cm3)", self.absolute_mmol_cm3),
        ):
            if not (np.isfinite(v) and v >= 0.0):
                raise InputError(f"{name}: must be finite and >= 0, got {v}")
        if self.relative == 0.0 and self.absolute_mmol_cm3 == 0.0:
            raise InputError("noise: the relative and absolute noise cannot both be 0")

    def sigma(self, amount_mmol_cm3: np.ndarray | float) -> np.ndarray:
        """Standard deviation of a measured amount (mmol/cm^3) under this noise model."""
        n = np.asarray(amount_mmol_cm3, dtype=float)
        return np.sqrt((self.relative * n) ** 2 + self.absolute_mmol_cm3**2)

    def describe(self) -> str:
        """The noise model as a formula."""
        return f"sigma = sqrt(({self.relative:g} n)^2 + ({self.absolute_mmol_cm3:g} mmol/cm3)^2)"


@dataclass
class ResolvingPower:
    """The resolving power of a kernel at one temperature on given pressures (definitions in
    the module docstring)."""

    temperature_K: float
    pressures_Pa: np.ndarray
    widths_w_nm: np.ndarray  # accessible kernel widths (w axis)
    widths_H_nm: np.ndarray
    single_step_nm: np.ndarray  # dw_1, pore volume free
    single_step_fixed_volume_nm: np.ndarray  # dw_fixed, pore volume known
    pair_half_separation_nm: np.ndarray  # dw_2
    kernel_noise_share: np.ndarray  # share of ||P2 g''||^2 explained by kernel errors
    resolved: np.ndarray  # dw_2 <= rho w
    limit_w_nm: float  # crossing above the widest resolved width; NaN
    limit_H_nm: float  # when all widths are resolved or none is
    all_resolved: bool
    none_resolved: bool
    singular_values: np.ndarray
    n_significant: int
    chi2_threshold: float
    resolution_fraction: float
    noise: NoiseModel

    def _at(self, values: np.ndarray, w_nm: float) -> float:
        w = self.widths_w_nm
        if w.size == 1:
            return float(values[0])
        with np.errstate(divide="ignore"):
            return float(np.exp(np.interp(w_nm, w, np.log(values))))

    def pair_at(self, w_nm: float) -> float:
        """dw_2 interpolated (in ln dw_2) at a width inside the kernel range."""
        return self._at(self.pair_half_separation_nm, w_nm)

    def single_at(self, w_nm: float) -> float:
        """dw_1 interpolated (in ln dw_1) at a width inside the kernel range."""
        return self._at(self.single_step_nm, w_nm)

    def is_resolved(self, w_nm: float) -> bool:
        """Whether a width (w, nm) is resolved."""
        if self.all_resolved:
            return True
        if self.none_resolved:
            return False
        return bool(w_nm <= self.limit_w_nm)

    def summary(self) -> str:
        """One line on the resolving power."""
        rho = self.resolution_fraction
        if self.none_resolved:
            return f"no kernel width is resolved (dw_2 > {rho:g} w everywhere)"
        top = self.widths_w_nm[-1] if self.all_resolved else self.limit_w_nm
        gaps = self.widths_w_nm[(~self.resolved) & (self.widths_w_nm < top)]
        extra = ""
        if gaps.size:
            shown = ", ".join(f"{x:.4g}" for x in gaps[:6]) + (", ..." if gaps.size > 6 else "")
            extra = f"; below it {gaps.size} width(s) not resolved: w = {shown} nm"
        if self.all_resolved:
            return (
                f"resolved up to the widest width, w = {self.widths_w_nm[-1]:.3g} nm "
                f"(dw_2 <= {rho:g} w){extra}"
            )
        return (
            f"pores wider than w = {self.limit_w_nm:.3g} nm (H = {self.limit_H_nm:.3g} nm) "
            f"are not resolved (dw_2 > {rho:g} w){extra}"
        )


def _label(kernel) -> str:
    path = getattr(kernel, "path", None)
    return str(path) if path is not None else f"kernel {kernel.name!r}"


#: Half-width of the window of widths for the kernel's curvature d2K/dw2 where the
#: three-point formula is noise (below), as a fraction of w: the pair criterion asks for K''
#: on the scale of the pair's half-separation (resolved: at most 0.25 w), while on a dense or
#: uneven width axis (0.002 nm at a pore's opening, two refined widths 0.003 nm apart) the
#: three-point formula's variance, which grows as h^-4, exceeds the curvature itself.
DERIVATIVE_WINDOW = 0.1


def second_derivative(
    k: np.ndarray, w: np.ndarray, window: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """d2K/dw2 along axis 1 and the (W, W) matrix C of its linear weights (d2 = k @ C.T), for
    propagating errors. At each interior width: twice the quadratic coefficient of the
    least-squares quadratic in w through the widths within ``window`` x w of it and at least
    its two neighbours (window 0: the three-point formula); at the two end widths the value
    of the nearest interior width."""
    w = np.asarray(w, dtype=float)
    n = w.size
    out = np.zeros_like(k)
    weights = np.zeros((n, n))
    if n < 3:
        return out, weights
    for j in range(1, n - 1):
        idx = np.flatnonzero(np.abs(w - w[j]) <= window * abs(w[j]))
        idx = np.union1d(idx, [j - 1, j, j + 1])
        x = w[idx] - w[j]
        design = np.stack([np.ones_like(x), x, x * x], axis=1)
        weights[j, idx] = 2.0 * np.linalg.pinv(design)[2]
    weights[0], weights[-1] = weights[1], weights[-2]
    out = k @ weights.T
    return out, weights


def second_derivative_variance(weights: np.ndarray, k_variance: np.ndarray) -> np.ndarray:
    """The variance of :func:`second_derivative` from independent errors of the kernel's
    columns (variance k_variance, shape (P, W)): sum_i C_ji^2 var K_i."""
    return k_variance @ (weights.T**2)


#: The three-point curvature is replaced at widths where the kernel's own noise makes up at
#: least this share of its part orthogonal to K and K' (what the pair criterion uses)
NOISY_CURVATURE_SHARE = 0.5


def curvature(
    k: np.ndarray,
    w: np.ndarray,
    d1: np.ndarray,
    k_variance: np.ndarray | None,
    sigma: np.ndarray,
) -> tuple[np.ndarray, np.ndarray | None]:
    """d2K/dw2 and its variance from the kernel's own errors (None without them): the
    three-point formula, or, at a width where the kernel's noise makes up at least
    NOISY_CURVATURE_SHARE of its part orthogonal to K and K' (:func:`resolution_from_matrix`'s
    noise share, against the experiment's noise sigma), the least-squares quadratic over
    DERIVATIVE_WINDOW x w."""
    d3, c3 = second_derivative(k, w)
    if k_variance is None:
        return d3, None
    v3 = second_derivative_variance(c3, k_variance)
    s = np.where(sigma > 0, sigma, 1e-300)
    share = resolution_from_matrix(k, d1, d3, s, 1.0, v3)["noise_share"]
    noisy = share >= NOISY_CURVATURE_SHARE
    if not np.any(noisy):
        return d3, v3
    dw, cw = second_derivative(k, w, DERIVATIVE_WINDOW)
    vw = second_derivative_variance(cw, k_variance)
    return np.where(noisy, dw, d3), np.where(noisy, vw, v3)


def resolution_from_matrix(
    k: np.ndarray,
    d1: np.ndarray,
    d2: np.ndarray,
    sigma: np.ndarray,
    chi2_threshold: float = 1.0,
    d2_variance: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """dw_1, dw_fixed and dw_2 (definitions in the module docstring) per column of the kernel
    matrix K (pressures x widths), from its first and second width derivatives and the noise
    sigma (all the same shape). ``d2_variance``: the variance of d2 from the kernel's own
    errors (same shape), subtracted from ||P2 g''||^2 in expectation; None: no correction.
    Returns a dict with keys single, fixed, pair, noise_share."""
    n_w = k.shape[1]
    root = math.sqrt(chi2_threshold)
    single = np.full(n_w, np.inf)
    fixed = np.full(n_w, np.inf)
    pair = np.full(n_w, np.inf)
    share = np.zeros(n_w)
    for j in range(n_w):
        s = sigma[:, j]
        u, g1, g2 = k[:, j] / s, d1[:, j] / s, d2[:, j] / s
        uu = float(u @ u)
        if uu <= 0.0:
            continue
        p1 = g1 - (float(g1 @ u) / uu) * u
        n1, nf = float(np.linalg.norm(p1)), float(np.linalg.norm(g1))
        single[j] = root / n1 if n1 > 0 else np.inf
        fixed[j] = root / nf if nf > 0 else np.inf
        q, r = np.linalg.qr(np.stack([u, g1], axis=1))
        q = q[:, np.abs(np.diag(r)) > 1e-12 * abs(r[0, 0])]
        p2 = g2 - q @ (q.T @ g2)
        obs = float(p2 @ p2)
        bias = 0.0
        if d2_variance is not None:
            lev = np.sum(q * q, axis=1)
            bias = float(np.sum((1.0 - lev) * d2_variance[:, j] / s**2))
        share[j] = min(bias / obs, 1.0) if obs > 0 else 1.0
        net = obs - bias
        pair[j] = math.sqrt(2.0 * root / math.sqrt(net)) if net > 0 else np.inf
    return {"single": single, "fixed": fixed, "pair": pair, "noise_share": share}


def extrapolate_ends(w: np.ndarray, d: np.ndarray) -> np.ndarray:
    """dw_2 at the two end widths, where no centred second difference exists: extrapolated
    linearly in ln dw_2 from the two nearest interior widths (copied when there is only one).

    Parameters
    ----------
    w : numpy.ndarray
        The widths (nm), increasing.
    d : numpy.ndarray
        dw_2 at those widths (nm); the two end values are replaced.

    Returns
    -------
    numpy.ndarray
        A copy of ``d`` with the end values extrapolated.
    """
    d = np.array(d, dtype=float)
    if w.size < 4:
        if w.size == 3:
            d[0] = d[2] = d[1]
        return d
    with np.errstate(divide="ignore", invalid="ignore"):
        ld = np.log(d)
    for end, a, b in ((0, 1, 2), (-1, -2, -3)):
        if np.isfinite(ld[a]) and np.isfinite(ld[b]):
            slope = (ld[a] - ld[b]) / (w[a] - w[b])
            d[end] = float(np.exp(ld[a] + slope * (w[end] - w[a])))
        else:
            d[end] = d[a]
    return d


def check_pressures(
    kernel: Kernel,
    temperature_K: float,
    pressures_Pa: np.ndarray | None,
    what: str = "pressures",
) -> np.ndarray:
    """The pressures to use at a temperature: the kernel's own by default; given ones must be
    positive, finite and not above the kernel's highest simulated pressure (no extrapolation
    beyond the simulations)."""
    own = kernel.pressures_Pa(temperature_K)
    if pressures_Pa is None:
        return np.asarray(own, dtype=float)
    p = np.unique(np.asarray(pressures_Pa, dtype=float))
    if p.size < 2:
        raise InputError(f"{what}: need at least 2 distinct pressures")
    if not np.all(np.isfinite(p)) or np.any(p <= 0.0):
        raise InputError(f"{what}: pressures must be finite and > 0 Pa")
    top = float(np.max(own))
    if p[-1] > top * (1.0 + 1e-9):
        raise InputError(
            f"{what}: {p[-1]:.4g} Pa is above the kernel's highest simulated pressure "
            f"{top:.4g} Pa at {temperature_K:g} K"
        )
    return p


def kernel_relative_errors(
    kernel,
    t: int,
    columns: np.ndarray,
    p: np.ndarray,
) -> np.ndarray:
    """Relative standard errors of the kernel's isotherms at pressures p for the given width
    indices, shape (P, W). Where the stored fit is an analytic form with a finite parameter
    covariance C: var n(p) = g C g^T with g = dn/d(parameters) (the form's gradient), at p
    clamped to the simulated range. Otherwise (the model-free interpolant) the points'
    relative errors interpolated in ln p. Constant beyond the simulated range."""
    from gcmc.kernel import forms as _forms

    data = kernel.data
    n = np.asarray(data.points["adsorption"]["density_per_nm3"], dtype=float)[t]
    e = np.asarray(data.points["adsorption"]["density_per_nm3_stderr"], dtype=float)[t]
    grid = np.asarray(data.pressures_Pa[t], dtype=float)
    out = np.zeros((p.size, len(columns)))
    for c, j in enumerate(columns):
        ok = np.isfinite(n[j]) & np.isfinite(e[j]) & (n[j] > 0) & np.isfinite(grid) & (grid > 0)
        if not np.any(ok):
            continue
        rec = data.fits[t][j]
        cov = np.asarray(rec.covariance, dtype=float)
        if rec.form in _forms.FORMS and cov.size and np.all(np.isfinite(cov)):
            f = _forms.FORMS[rec.form]
            q = np.clip(p, np.min(grid[ok]), np.max(grid[ok]))
            g = f.gradient(np.asarray(rec.parameters, dtype=float), q)
            var = np.einsum("pi,ij,pj->p", g, cov, g)
            val = f.evaluate(np.asarray(rec.parameters, dtype=float), q)
            with np.errstate(divide="ignore", invalid="ignore"):
                out[:, c] = np.where(val > 0, np.sqrt(np.maximum(var, 0.0)) / val, 0.0)
            continue
        order = np.argsort(grid[ok])
        rel = (e[j][ok] / n[j][ok])[order]
        out[:, c] = np.interp(np.log(p), np.log(grid[ok][order]), rel)
    return out


def resolving_power(
    kernel,
    temperature_K: float,
    pressures_Pa: np.ndarray | None = None,
    noise: NoiseModel | None = None,
    chi2_threshold: float = DEFAULT_CHI2_THRESHOLD,
    resolution_fraction: float = DEFAULT_RESOLUTION_FRACTION,
    correct_kernel_noise: bool = True,
) -> ResolvingPower:
    """Resolving power of ``kernel`` (gcmc.reader.Kernel) at ``temperature_K`` on the given
    pressures (default: the kernel's own), for the noise model (default NoiseModel())."""
    noise = noise or NoiseModel()
    if not (np.isfinite(chi2_threshold) and chi2_threshold > 0.0):
        raise InputError(f"chi2 threshold: must be > 0, got {chi2_threshold}")
    if not (np.isfinite(resolution_fraction) and resolution_fraction > 0.0):
        raise InputError(f"resolution fraction: must be > 0, got {resolution_fraction}")
    data = kernel.data
    t = kernel.temperature_index(float(temperature_K))
    p = check_pressures(kernel, temperature_K, pressures_Pa)
    acc = np.asarray(data.accessible[t], dtype=bool)
    w_all = np.asarray(data.widths_w_nm, dtype=float)
    h_all = np.asarray(data.widths_H_nm, dtype=float)
    if np.count_nonzero(acc) < 3:
        raise InputError(
            f"{_label(kernel)}: fewer than 3 accessible widths at "
            f"{temperature_K:g} K: no resolving power to compute"
        )
    cols = np.flatnonzero(acc)
    w = w_all[cols]
    k = kernel.evaluate(p, w, float(data.temperatures_K[t])) * MMOL_PER_CM3_PER_NM3
    if not np.all(np.isfinite(k)):
        raise InputError(f"{_label(kernel)}: the kernel is not finite on the requested pressures")
    d1 = np.gradient(k, w, axis=1, edge_order=2)
    sigma = noise.sigma(k)
    sk2 = None
    if correct_kernel_noise:
        sk2 = (kernel_relative_errors(kernel, t, cols, p) * k) ** 2
    d2, var2 = curvature(k, w, d1, sk2, sigma)
    out = resolution_from_matrix(k, d1, d2, sigma, chi2_threshold, var2)
    pair = extrapolate_ends(w, out["pair"])
    ratio = pair / w
    resolved = ratio <= resolution_fraction
    all_res = bool(resolved[-1])
    none_res = not bool(np.any(resolved))
    limit = float("nan")
    if not all_res and not none_res:
        j = int(np.flatnonzero(resolved)[-1])  # widest resolved; j + 1 is not
        x0 = math.log(ratio[j] / resolution_fraction)
        x1 = math.log(ratio[j + 1] / resolution_fraction) if np.isfinite(ratio[j + 1]) else None
        frac = x0 / (x0 - x1) if x1 is not None and x1 != x0 else 1.0
        limit = float(w[j] + min(max(frac, 0.0), 1.0) * (w[j + 1] - w[j]))
    offset = float(np.median(h_all - w_all))
    reference = noise.sigma(np.mean(k, axis=1))
    sv = np.linalg.svd(k / reference[:, None], compute_uv=False)
    return ResolvingPower(
        temperature_K=float(data.temperatures_K[t]),
        pressures_Pa=p,
        widths_w_nm=w,
        widths_H_nm=h_all[cols],
        single_step_nm=out["single"],
        single_step_fixed_volume_nm=out["fixed"],
        pair_half_separation_nm=pair,
        kernel_noise_share=out["noise_share"],
        resolved=resolved,
        limit_w_nm=limit,
        limit_H_nm=limit + offset if np.isfinite(limit) else float("nan"),
        all_resolved=all_res,
        none_resolved=none_res,
        singular_values=sv,
        n_significant=int(np.count_nonzero(sv >= 1.0)),
        chi2_threshold=float(chi2_threshold),
        resolution_fraction=float(resolution_fraction),
        noise=noise,
    )


__all__ = [
    "DEFAULT_CHI2_THRESHOLD",
    "DEFAULT_RESOLUTION_FRACTION",
    "NoiseModel",
    "ResolvingPower",
    "check_pressures",
    "extrapolate_ends",
    "kernel_relative_errors",
    "resolution_from_matrix",
    "resolving_power",
    "curvature",
    "second_derivative",
    "second_derivative_variance",
]
