"""The equilibrium transition of one pore from its two metastable branches (post-processing of a
finished kernel's points; numpy only, so a downstream reader can use it without numba/scipy).

Thermodynamics (grand ensemble, fixed T and V; Gibbs-Duhem): d(beta Omega / V) = -n d ln f,
n the absolute density per pore volume (nm^-3) and f the bulk fugacity (Pa), because
beta mu = ln f + const. Integrated along a branch on which the pore state changes reversibly:

* gas-like branch (adsorption, below its jump), from the dilute limit: beta omega_g(f) =
  -[tail + int_{ln f_0}^{ln f} n_ads d ln f'], with the Henry-law tail
  tail = int_0^{f_0} (n/f) df. n/f runs from the exact Henry constant K_H (f -> 0) to
  n_0/f_0 at the lowest point; taken linear in f there (exact to the second virial
  coefficient): tail = (K_H f_0 + n_0)/2. Pure Henry (K_H f_0) differs from it by
  (n_0 - K_H f_0)/2; half of that difference is added to the integration error.
* liquid-like branch (desorption, above its drop), from an *anchor*: beta omega_l(f) =
  beta omega_l(f_top) + int_{ln f}^{ln f_top} n_des d ln f'.

The transition f_eq is the zero of D(ln f) = beta (omega_g - omega_l), which increases
monotonically (dD/d ln f = n_l - n_g > 0). The equilibrium branch is the adsorption branch
below f_eq and the desorption branch above (Peterson & Gubbins, Mol. Phys. 62 (1987) 215).

The anchor is the point of the method: omega_l(f_top) cannot be taken from the adsorption
branch integrated through its jump, although both branches coincide at f_top. The jump is
irreversible (n changes at fixed mu); integrating n d ln f across it drops the free-energy
difference of the two states, and gives omega_l - omega_g = int_{ln f}^{ln f_top} (n_des -
n_ads) d ln f' >= 0 over the whole loop, i.e. a "transition" at the adsorption jump whatever
the true one is. The
liquid-branch anchor needs a reversible path that avoids the loop (e.g. through a temperature
above the pore's critical point, or a flat-histogram sampler's grand potential); the caller
passes it (``liquid_anchor``). Without one, a pore with a loop gets no transition and says so.

Integration: on a monotone piecewise-cubic Hermite interpolant (Fritsch & Carlson, SIAM J.
Numer. Anal. 17 (1980) 238) of n in ln f through the points, integrated exactly per interval;
monotone because the branches are steep next to the loop and a free spline overshoots there.
The integration error is estimated as the larger of |PCHIP - trapezoid| of D at f_eq (the
trapezoid rule is the piecewise-linear interpolant) and |PCHIP - PCHIP on every other point|
(which sees a steep rise between two points that both interpolants miss alike), plus the tail
term above, turned into ln f by the slope n_l - n_g. The points' standard errors enter D
through the trapezoid weights and the tail, and give sigma(ln f_eq) = sigma(D)/(n_l - n_g).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gcmc.errors import InputError
from gcmc.kernel.data import KernelData

#: Branches are "different" (a loop point) where |n_des - n_ads| > LOOP_Z combined sigma.
LOOP_Z = 4.0
# reasons (one line each; "" when a transition was found)
NO_LOOP = "no hysteresis loop: the branches agree within errors"
NO_DESORPTION = "no desorption branch"
TOP_DISAGREE = "the branches differ at the top pressure: the loop extends beyond the grid"
LOW_DISAGREE = "the branches differ at the lowest pressure: the loop extends below the grid"
NO_ANCHOR = "loop without a reversible-path anchor for the liquid branch's grand potential"
SEPARATED = (
    "the branches part at separated points (two loops, or a stray point): no single transition"
)
UNRESOLVED = "the transition lies beyond one grid interval outside the sampled loop"


@dataclass(frozen=True)
class EquilibriumResult:
    """The equilibrium transition of one pore.

    Attributes
    ----------
    fugacity_Pa, pressure_Pa : float
        f_eq and p_eq (NaN when there is no transition).
    ln_f_stderr : float
        Statistical standard error of ln f_eq (from the points' errors and the anchor's).
    ln_f_integration_error : float
        Estimated integration error of ln f_eq (|PCHIP - trapezoid|, tail, extrapolation).
    pressure_uncertainty_Pa : float
        p_eq * sqrt(stderr^2 + integration_error^2) (d ln p = d ln f locally).
    density_per_nm3, density_per_nm3_stderr : numpy.ndarray
        The equilibrium branch at each grid pressure (NaN where no point, or no branch).
    beta_omega_gas_per_nm3, beta_omega_liquid_per_nm3 : numpy.ndarray
        beta Omega / V of the two branches at the grid points (NaN outside their range).
    reason : str
        Why there is no transition ("" when there is one; ``NO_LOOP`` when the branches agree,
        in which case the equilibrium branch is the adsorption branch).
    extrapolated : bool
        f_eq lies within one grid interval beyond the last point where both branches exist.
    loop_pressure_range_Pa : tuple[float, float]
        Where a loop was found inside the grid: the grid pressures just below and just above
        it (the last point where the branches agree below the loop, the first above). The
        transition lies between the desorption drop and the adsorption jump, so within this
        bracket, with or without an anchor. (NaN, NaN) without a loop inside the grid.
    """

    fugacity_Pa: float
    pressure_Pa: float
    ln_f_stderr: float
    ln_f_integration_error: float
    pressure_uncertainty_Pa: float
    density_per_nm3: np.ndarray
    density_per_nm3_stderr: np.ndarray
    beta_omega_gas_per_nm3: np.ndarray
    beta_omega_liquid_per_nm3: np.ndarray
    reason: str
    extrapolated: bool = False
    loop_pressure_range_Pa: tuple[float, float] = (float("nan"), float("nan"))

    @property
    def has_transition(self) -> bool:
        """True when f_eq was found."""
        return bool(np.isfinite(self.fugacity_Pa))


# --------------------------------------------------------------------------------------------
# monotone cubic Hermite interpolation (Fritsch-Carlson slopes, as in common PCHIP codes)
# --------------------------------------------------------------------------------------------
def pchip_slopes(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Slopes dy/dx at the nodes of the monotone piecewise-cubic Hermite interpolant
    (Fritsch & Carlson 1980: weighted harmonic mean inside, one-sided three-point ends)."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    n = x.size
    if n < 2:
        return np.zeros(n)
    h = np.diff(x)
    delta = np.diff(y) / h
    if n == 2:
        return np.array([delta[0], delta[0]])
    d = np.zeros(n)
    w1 = 2 * h[1:] + h[:-1]
    w2 = h[1:] + 2 * h[:-1]
    same = (np.sign(delta[:-1]) * np.sign(delta[1:])) > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        hm = (w1 + w2) / (w1 / delta[:-1] + w2 / delta[1:])
    d[1:-1] = np.where(same, hm, 0.0)

    def end(h0: float, h1: float, m0: float, m1: float) -> float:
        s = ((2 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
        if np.sign(s) != np.sign(m0):
            return 0.0
        if np.sign(m0) != np.sign(m1) and abs(s) > abs(3 * m0):
            return 3 * m0
        return float(s)

    d[0] = end(h[0], h[1], delta[0], delta[1])
    d[-1] = end(h[-1], h[-2], delta[-1], delta[-2])
    return d


def _hermite_cumulative(x: np.ndarray, y: np.ndarray, d: np.ndarray, xq: float) -> float:
    """Integral of the cubic Hermite interpolant (nodes x, values y, slopes d) from x[0] to
    xq (x[0] <= xq <= x[-1]), exact per interval."""
    total = 0.0
    for i in range(x.size - 1):
        a, b = x[i], x[i + 1]
        if xq <= a:
            break
        h = b - a
        if xq >= b:
            total += h * (y[i] + y[i + 1]) / 2 + h * h * (d[i] - d[i + 1]) / 12
            continue
        t = (xq - a) / h  # partial interval: integrate the Hermite basis from 0 to t
        h00 = t - t**3 + t**4 / 2
        h10 = t**2 / 2 - 2 * t**3 / 3 + t**4 / 4
        h01 = t**3 - t**4 / 2
        h11 = -(t**3) / 3 + t**4 / 4
        total += h * (h00 * y[i] + h10 * h * d[i] + h01 * y[i + 1] + h11 * h * d[i + 1])
        break
    return total


def hermite_eval(x: np.ndarray, y: np.ndarray, d: np.ndarray, xq: float) -> float:
    """The cubic Hermite interpolant (nodes x, values y, slopes d) at xq (clamped to the
    range)."""
    xq = min(max(float(xq), float(x[0])), float(x[-1]))
    i = min(int(np.searchsorted(x, xq, side="right")) - 1, x.size - 2)
    h = x[i + 1] - x[i]
    t = (xq - x[i]) / h
    return float(
        (2 * t**3 - 3 * t**2 + 1) * y[i]
        + (t**3 - 2 * t**2 + t) * h * d[i]
        + (-2 * t**3 + 3 * t**2) * y[i + 1]
        + (t**3 - t**2) * h * d[i + 1]
    )


def _trap(x: np.ndarray, y: np.ndarray, xq: float) -> float:
    total = 0.0
    for i in range(x.size - 1):
        a, b = x[i], x[i + 1]
        if xq <= a:
            break
        bb = min(b, xq)
        yb = y[i] + (y[i + 1] - y[i]) * (bb - a) / (b - a)
        total += (bb - a) * (y[i] + yb) / 2
    return total


def _trap_weights(x: np.ndarray, xq: float) -> np.ndarray:
    """Weights w with sum(w * y) = trapezoid integral from x[0] to xq (for error propagation)."""
    w = np.zeros(x.size)
    for i in range(x.size - 1):
        a, b = x[i], x[i + 1]
        if xq <= a:
            break
        bb = min(b, xq)
        s = (bb - a) / (b - a)
        w[i] += (bb - a) * (1 - s / 2)
        w[i + 1] += (bb - a) * s / 2
    return w


# --------------------------------------------------------------------------------------------
# the transition of one pore
# --------------------------------------------------------------------------------------------
def _vec(x: object, name: str) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    if a.ndim != 1:
        raise InputError(f"{name}: must be a 1-D array over the pressure grid")
    return a


def equilibrium_transition(
    fugacities_Pa: np.ndarray,
    pressures_Pa: np.ndarray,
    n_ads: np.ndarray,
    s_ads: np.ndarray,
    n_des: np.ndarray | None,
    s_des: np.ndarray | None,
    henry_per_nm3_per_pa: float,
    liquid_anchor: tuple[float, float] | None = None,
    loop_z: float = LOOP_Z,
) -> EquilibriumResult:
    """The equilibrium transition of one pore (module docstring).

    Parameters
    ----------
    fugacities_Pa, pressures_Pa : numpy.ndarray
        (P,) bulk fugacity and pressure of each grid point (increasing; NaN: no point).
    n_ads, s_ads, n_des, s_des : numpy.ndarray
        (P,) absolute densities (nm^-3 of pore volume) and standard errors of the branches;
        ``n_des`` None when there is no desorption branch.
    henry_per_nm3_per_pa : float
        The exact Henry constant K_H (lim n/f, nm^-3 Pa^-1).
    liquid_anchor : (float, float) or None
        beta Omega / V (nm^-3) of the desorption-branch state at the top grid fugacity and its
        standard error, from a reversible path that avoids the loop. None: not known.
    loop_z : float
        Branches differ where |n_des - n_ads| > loop_z combined standard errors.
    """
    f = _vec(fugacities_Pa, "fugacities_Pa")
    p = _vec(pressures_Pa, "pressures_Pa")
    na, sa = _vec(n_ads, "n_ads"), _vec(s_ads, "s_ads")
    P = f.size
    for name, arr in (("pressures_Pa", p), ("n_ads", na), ("s_ads", sa)):
        if arr.size != P:
            raise InputError(f"{name}: length {arr.size}, expected {P} (the fugacity grid)")
    if not (np.isfinite(henry_per_nm3_per_pa) and henry_per_nm3_per_pa >= 0):
        raise InputError("henry_per_nm3_per_pa: must be finite and >= 0")
    nan = np.full(P, np.nan)

    bracket = (float("nan"), float("nan"))

    def result(reason: str, dens: np.ndarray, err: np.ndarray) -> EquilibriumResult:
        return EquilibriumResult(
            np.nan, np.nan, np.nan, np.nan, np.nan, dens, err, nan, nan, reason, False, bracket
        )

    if n_des is None or s_des is None or not np.any(np.isfinite(n_des)):
        return result(NO_DESORPTION, nan.copy(), nan.copy())
    nd, sd = _vec(n_des, "n_des"), _vec(s_des, "s_des")
    if nd.size != P or sd.size != P:
        raise InputError(f"n_des: length {nd.size}, expected {P} (the fugacity grid)")
    ok = np.isfinite(f) & (f > 0) & np.isfinite(na) & np.isfinite(nd) & np.isfinite(p)
    idx = np.flatnonzero(ok)
    if idx.size < 2:
        return result(NO_LOOP, na.copy(), sa.copy())
    if np.any(np.diff(f[idx]) <= 0):
        raise InputError("fugacities_Pa: must increase along the grid")
    # a point without a standard error (NaN) takes no part in deciding where the branches
    # part; exact data (error 0) part wherever they differ
    comb = np.sqrt(sa[idx] ** 2 + sd[idx] ** 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.abs(nd[idx] - na[idx]) / comb
    z = np.where(comb == 0, np.where(nd[idx] != na[idx], np.inf, 0.0), z)
    loop = np.flatnonzero(np.nan_to_num(z, nan=0.0) > loop_z)
    if loop.size == 0:
        return result(NO_LOOP, na.copy(), sa.copy())
    if loop[-1] == idx.size - 1:
        return result(TOP_DISAGREE, nan.copy(), nan.copy())
    if loop[0] == 0:
        return result(LOW_DISAGREE, nan.copy(), nan.copy())
    if np.any(np.diff(loop) > 1):
        return result(SEPARATED, nan.copy(), nan.copy())
    bracket = (float(p[idx[loop[0] - 1]]), float(p[idx[loop[-1] + 1]]))
    if liquid_anchor is None:
        return result(NO_ANCHOR, nan.copy(), nan.copy())
    anchor, anchor_err = (float(v) for v in liquid_anchor)

    x = np.log(f[idx])
    k_lo, k_hi = int(loop[0]), int(loop[-1])  # positions within idx
    # gas-like branch: adsorption points 0..k_hi; liquid-like: desorption points k_lo..top
    xg, yg, eg = x[: k_hi + 1], na[idx][: k_hi + 1], np.nan_to_num(sa[idx][: k_hi + 1])
    xl, yl, el = x[k_lo:], nd[idx][k_lo:], np.nan_to_num(sd[idx][k_lo:])
    dg, dl = pchip_slopes(xg, yg), pchip_slopes(xl, yl)
    kh = float(henry_per_nm3_per_pa)
    f0, n0 = float(f[idx][0]), float(yg[0])
    tail = (kh * f0 + n0) / 2
    tail_err = abs(n0 - kh * f0) / 4
    ig_top, il_top = _hermite_cumulative(xl, yl, dl, xl[-1]), xl[-1]

    def every_other(xs: np.ndarray, ys: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        keep = np.unique(np.r_[np.arange(0, xs.size, 2), xs.size - 1])
        return xs[keep], ys[keep], pchip_slopes(xs[keep], ys[keep])

    xg2, yg2, dg2 = every_other(xg, yg)
    xl2, yl2, dl2 = every_other(xl, yl)

    def d_of(xq: float, cubic: bool = True, coarse: bool = False) -> float:
        """D = beta(omega_g - omega_l) at ln f = xq (within both ranges); ``coarse``: the
        cubic on every other node of each branch."""
        if coarse:
            ig = _hermite_cumulative(xg2, yg2, dg2, xq)
            il = _hermite_cumulative(xl2, yl2, dl2, xl2[-1]) - _hermite_cumulative(
                xl2, yl2, dl2, xq
            )
        elif cubic:
            ig = _hermite_cumulative(xg, yg, dg, xq)
            il = ig_top - _hermite_cumulative(xl, yl, dl, xq)
        else:
            ig = _trap(xg, yg, xq)
            il = _trap(xl, yl, il_top) - _trap(xl, yl, xq)
        return -(tail + ig) - (anchor + il)

    def slope(xq: float) -> float:
        """dD/d ln f = n_l - n_g (linear interpolation)."""
        return float(np.interp(xq, xl, yl) - np.interp(xq, xg, yg))

    a, b = float(xl[0]), float(xg[-1])  # overlap of the two sampled ranges
    da, db = d_of(a), d_of(b)
    extrapolated = False
    extrap_err = 0.0
    if da <= 0 <= db:
        lo, hi = a, b
        for _ in range(100):  # bisection: D is monotone
            mid = (lo + hi) / 2
            if d_of(mid) < 0:
                lo = mid
            else:
                hi = mid
        xe = (lo + hi) / 2
    else:
        # beyond the sampled overlap: linear extrapolation of D with the local slope, allowed
        # within one grid interval (the transition lies between the desorption drop and the
        # adsorption jump, which lie within one interval beyond the loop's ends)
        extrapolated = True
        if db < 0:
            s_end = yl[k_hi - k_lo] - yg[-1]
            xe = b - db / s_end
            bound = x[k_hi + 1]
            if k_hi - 1 >= k_lo:
                s_prev = yl[k_hi - 1 - k_lo] - yg[-2]
                extrap_err = abs(db / s_end - db / s_prev)
            else:
                extrap_err = abs(xe - b)
            inside = xe < bound
        else:
            s_end = yl[0] - yg[k_lo]
            xe = a - da / s_end
            bound = x[k_lo - 1]
            if k_lo + 1 <= k_hi:
                s_prev = yl[1] - yg[k_lo + 1]
                extrap_err = abs(da / s_end - da / s_prev)
            else:
                extrap_err = abs(xe - a)
            inside = xe > bound
        if not inside:
            return result(UNRESOLVED, nan.copy(), nan.copy())
    xc = min(max(xe, a), b)  # where the integrals are evaluated
    dn = slope(xc)
    # statistical error of D at xc: trapezoid weights of each branch, the tail and the anchor
    wg = _trap_weights(xg, xc)
    wl = _trap_weights(xl, xl[-1]) - _trap_weights(xl, xc)
    wg[0] += 0.5  # the tail's n_0
    var_d = float(np.sum((wg * eg) ** 2) + np.sum((wl * el) ** 2) + anchor_err**2)
    d_c = d_of(xc)
    integ = max(abs(d_c - d_of(xc, cubic=False)), abs(d_c - d_of(xc, coarse=True))) + tail_err
    ln_f_stderr = float(np.sqrt(var_d) / dn)
    ln_f_integ = float(integ / dn + extrap_err)
    f_eq = float(np.exp(xe))
    # p(f) between grid points: monotone cubic in (ln f, ln p); |cubic - linear| its error
    lnp = np.log(p[idx])
    lnp_eq = hermite_eval(x, lnp, pchip_slopes(x, lnp), xe)
    lnp_err = abs(lnp_eq - float(np.interp(xe, x, lnp)))
    p_eq = float(np.exp(lnp_eq))
    unc = p_eq * float(np.sqrt(ln_f_stderr**2 + ln_f_integ**2 + lnp_err**2))
    # the branch at every grid point
    lnf_all = np.log(np.where(np.isfinite(f) & (f > 0), f, np.nan))
    below = lnf_all < xe
    dens = np.where(below, na, nd)
    err = np.where(below, sa, sd)
    dens = np.where(np.isfinite(lnf_all), dens, np.nan)
    err = np.where(np.isfinite(lnf_all), err, np.nan)
    og, ol = nan.copy(), nan.copy()
    for j, i in enumerate(idx):
        if j <= k_hi:
            og[i] = -(tail + _hermite_cumulative(xg, yg, dg, x[j]))
        if j >= k_lo:
            ol[i] = anchor + ig_top - _hermite_cumulative(xl, yl, dl, x[j])
    return EquilibriumResult(
        f_eq, p_eq, ln_f_stderr, ln_f_integ, unc, dens, err, og, ol, "", extrapolated, bracket
    )


# --------------------------------------------------------------------------------------------
# the exact reference for a continuous loop
# --------------------------------------------------------------------------------------------
def maxwell_equal_area(ln_f: np.ndarray, n: np.ndarray) -> float:
    """ln f of the Maxwell equal-area construction for a continuous isotherm given as a curve
    n -> ln f (n increasing, ln f with a van der Waals loop: rising, falling, rising), finely
    sampled: the ln f* at which int (ln f(n) - ln f*) dn over the three-valued range is zero
    (Maxwell 1875; the Gibbs-Duhem integral around the loop vanishes). Returns NaN without a
    loop."""
    y = np.asarray(ln_f, float)
    nn = np.asarray(n, float)
    dy = np.diff(y)
    if not np.any(dy < 0):
        return float("nan")
    i_max = int(np.argmax(dy < 0))  # first local maximum (upper end of the gas branch)
    i_min = i_max + int(np.argmax(dy[i_max:] >= 0))  # following local minimum
    y_lo, y_hi = y[i_min], y[i_max]

    def area(ys: float) -> float:
        lo = int(np.argmax(y[: i_max + 1] >= ys))  # gas branch crosses ys
        hi = i_min + int(np.argmax(y[i_min:] >= ys))  # liquid branch crosses ys
        seg_n, seg_y = nn[lo : hi + 1], y[lo : hi + 1] - ys
        return float(np.sum((seg_y[1:] + seg_y[:-1]) * np.diff(seg_n)) / 2)

    lo, hi = y_lo, y_hi
    for _ in range(100):
        mid = (lo + hi) / 2
        if area(mid) > 0:
            lo = mid
        else:
            hi = mid
    return (lo + hi) / 2


def pore_transition(
    data: KernelData,
    t: int,
    j: int,
    liquid_anchor: tuple[float, float] | None = None,
    loop_z: float = LOOP_Z,
) -> EquilibriumResult:
    """:func:`equilibrium_transition` of pore ``j`` at temperature index ``t`` of a kernel (in
    memory or as read by :func:`gcmc.kernel.reader.open_kernel`), from its stored points,
    fugacities and exact Henry constant."""
    n_t, n_w = np.shape(data.henry_per_nm3_per_pa)
    if not (0 <= t < n_t and 0 <= j < n_w):
        raise InputError(f"pore index: (t, j) = ({t}, {j}) outside the kernel's ({n_t}, {n_w})")
    ads = data.points["adsorption"]
    des = data.points.get("desorption")
    nan = np.full(np.shape(ads["density_per_nm3"])[-1], np.nan)

    def get(branch: dict[str, np.ndarray] | None, name: str) -> np.ndarray | None:
        if branch is None or name not in branch:
            return None if branch is None else nan
        return np.asarray(branch[name], float)[t, j]

    return equilibrium_transition(
        np.asarray(data.fugacities_Pa, float)[t],
        np.asarray(data.pressures_Pa, float)[t],
        get(ads, "density_per_nm3"),
        get(ads, "density_per_nm3_stderr"),
        get(des, "density_per_nm3"),
        get(des, "density_per_nm3_stderr"),
        float(np.asarray(data.henry_per_nm3_per_pa, float)[t, j]),
        liquid_anchor,
        loop_z,
    )


def kernel_transitions(data: KernelData) -> list[tuple[int, int, EquilibriumResult]]:
    """:func:`pore_transition` without an anchor for every accessible pore of a kernel with a
    desorption branch: (t, j, result); [] without one. Tells where the branches part (the
    loop's bracket) and why no transition is given."""
    if "desorption" not in data.points:
        return []
    acc = np.asarray(data.accessible, bool)
    return [(t, j, pore_transition(data, t, j)) for t, j in zip(*np.nonzero(acc), strict=True)]


# --------------------------------------------------------------------------------------------
# the liquid-branch anchor along a reversible path in (beta, ln z)
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PathIntegral:
    """beta Omega / V (nm^-3) at the end of a reversible path, with its statistical standard
    error and an estimate of the integration error (summed over the legs)."""

    beta_omega_per_nm3: float
    stderr: float
    integration_error: float

    @property
    def anchor(self) -> tuple[float, float]:
        """``liquid_anchor`` for :func:`equilibrium_transition`: the value and the combined
        uncertainty (statistical and integration, in quadrature)."""
        return self.beta_omega_per_nm3, float(np.hypot(self.stderr, self.integration_error))


def _legs(beta: np.ndarray, ln_z: np.ndarray) -> list[tuple[int, int, str]]:
    """Split a path into maximal legs along one variable: (first, last, "z" | "beta" | "both")
    with ln z changing at fixed beta, beta at fixed ln z, or both (a diagonal segment)."""
    kinds = np.where(np.diff(beta) == 0, "z", np.where(np.diff(ln_z) == 0, "beta", "both"))
    legs, start = [], 0
    for i in range(1, kinds.size + 1):
        if i == kinds.size or kinds[i] != kinds[start] or kinds[i] == "both":
            legs.append((start, i, str(kinds[start])))
            start = i
    return legs


def _leg_integral(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """int y dx along a leg (x monotone): the monotone cubic's integral and its error estimate,
    the larger of |cubic - trapezoid| and |cubic - cubic on every other node| (the second sees
    a step between two nodes that both interpolants miss alike; for two points: the
    trapezoid, and half the difference of its end rectangles)."""
    if x[-1] < x[0]:
        v, e = _leg_integral(x[::-1], y[::-1])
        return -v, e
    trap = _trap(x, y, float(x[-1]))
    if x.size < 3:
        return trap, abs((y[-1] - y[0]) * (x[-1] - x[0])) / 4
    cubic = _hermite_cumulative(x, y, pchip_slopes(x, y), float(x[-1]))
    # on every other node (and the last): a feature between two nodes shows up here
    half = np.unique(np.r_[np.arange(0, x.size, 2), x.size - 1])
    xh, yh = x[half], y[half]
    if xh.size >= 3:
        coarse = _hermite_cumulative(xh, yh, pchip_slopes(xh, yh), float(x[-1]))
    else:
        coarse = _trap(xh, yh, float(x[-1]))
    return cubic, max(abs(cubic - trap), abs(cubic - coarse))


def path_grand_potential(
    beta_per_K: np.ndarray,
    ln_z: np.ndarray,
    density_per_nm3: np.ndarray,
    energy_K_per_nm3: np.ndarray,
    henry_density0_per_nm3: float,
    density_stderr: np.ndarray | None = None,
    energy_stderr: np.ndarray | None = None,
) -> PathIntegral:
    """beta Omega / V at the last state of a path of simulated states that starts dilute and
    changes reversibly (no loop anywhere on it), e.g. up an isotherm above the pore's
    critical temperature, then at high activity down in temperature, then down the liquid
    branch of the kernel's isotherm to its top point.

    beta Omega = -ln Xi(beta, z) gives d(beta Omega / V) = u d beta - n d ln z, u = <U>/V the
    configurational energy per volume in K nm^-3 (U/k) and z the activity (any fixed
    normalisation: only differences of ln z enter; at fixed T, d ln z = d ln f). The path is
    cut into legs along one variable (ln z at fixed beta, beta at fixed ln z), each
    integrated on the monotone cubic in its variable (error: :func:`_leg_integral`)
    (a diagonal segment: the trapezoid rule); the start is dilute, with
    beta Omega/V = -(n_H + n_0)/2, n_H = K_H f_0 the Henry-law density at the first point
    (module docstring). Standard errors propagate through the trapezoid weights.
    """
    b = _vec(beta_per_K, "beta_per_K")
    z = _vec(ln_z, "ln_z")
    n = _vec(density_per_nm3, "density_per_nm3")
    u = _vec(energy_K_per_nm3, "energy_K_per_nm3")
    m = b.size
    if m < 3 or any(a.size != m for a in (z, n, u)):
        raise InputError("path: beta, ln_z, density and energy need the same length (>= 3)")
    if not all(np.all(np.isfinite(a)) for a in (b, z, n, u)):
        raise InputError("path: every state needs finite beta, ln_z, density and energy")
    sn = np.zeros(m) if density_stderr is None else _vec(density_stderr, "density_stderr")
    su = np.zeros(m) if energy_stderr is None else _vec(energy_stderr, "energy_stderr")
    start = -(float(henry_density0_per_nm3) + n[0]) / 2
    if np.any((np.diff(b) == 0) & (np.diff(z) == 0)):
        raise InputError("path: two consecutive states are the same (beta and ln_z)")
    total, integ = 0.0, 0.0
    for i, k, kind in _legs(b, z):
        sl = slice(i, k + 1)
        if kind == "z":
            v, e = _leg_integral(z[sl], n[sl])
            total -= v
        elif kind == "beta":
            v, e = _leg_integral(b[sl], u[sl])
            total += v
        else:
            v = (u[i] + u[k]) / 2 * (b[k] - b[i]) - (n[i] + n[k]) / 2 * (z[k] - z[i])
            e = (abs((u[k] - u[i]) * (b[k] - b[i])) + abs((n[k] - n[i]) * (z[k] - z[i]))) / 4
            total += v
        integ += e
    db, dz = np.diff(b), np.diff(z)
    wb = np.zeros(m)
    wz = np.zeros(m)
    wb[1:] += db / 2
    wb[:-1] += db / 2
    wz[1:] += dz / 2
    wz[:-1] += dz / 2
    wz[0] += 0.5  # the start's n_0
    var = float(np.sum((wz * sn) ** 2) + np.sum((wb * su) ** 2))
    tail_err = abs(n[0] - float(henry_density0_per_nm3)) / 4
    return PathIntegral(start + total, float(np.sqrt(var)), integ + tail_err)


# --------------------------------------------------------------------------------------------
# is the path reversible? the changes between states against the fluctuations at its ends
# --------------------------------------------------------------------------------------------
#: an interval of a path is a jump when a mean changes by more than PATH_JUMP_FACTOR x the
#: larger of its two end derivatives x the step, after PATH_JUMP_Z combined standard errors
#: of the change are allowed for noise (:func:`path_jumps`)
PATH_JUMP_FACTOR = 2.0
PATH_JUMP_Z = 4.0
#: the reason stored for a pore whose anchor path has a jump (formatted by
#: :func:`describe_path_jump`)
PATH_JUMP = "the anchor path is not reversible"


@dataclass(frozen=True)
class PathJump:
    """The worst interval of a path (:func:`path_jumps`): states i -> i + 1, the quantity
    ("density" or "energy") and its ratio, change / (larger end derivative x step)."""

    index: int
    quantity: str
    ratio: float


def path_jumps(
    beta_per_K: np.ndarray,
    ln_z: np.ndarray,
    density_per_nm3: np.ndarray,
    density_stderr: np.ndarray,
    energy_K_per_nm3: np.ndarray,
    energy_stderr: np.ndarray,
    n_variance_per_nm3: np.ndarray,
    nu_covariance_K_per_nm3: np.ndarray,
    u_variance_K2_per_nm3: np.ndarray,
) -> np.ndarray:
    """Per interval i -> i + 1 of a path (shape (m - 1, 2): density, energy): the change of
    the mean beyond its noise, over the largest change the fluctuations at the two ends
    allow. A value above PATH_JUMP_FACTOR marks a jump; NaN where a state lacks its
    fluctuations or the interval changes both variables.

    The grand canonical means have exact derivatives in their fluctuations, at a fixed
    activity z = f/(kT) (n = <N>/V, u = <U/k>/V; module docstring of gcmc.pipeline.anchor):

        dn/d ln z = var N / V,         du/d ln z = cov(N, U/k) / V,
        dn/d beta = -cov(N, U/k) / V,  du/d beta = -var(U/k) / V.

    Along a leg in x (ln z at fixed beta, beta at fixed ln z) the change of a mean over an
    interval is the mean of its derivative inside; where that derivative varies monotonically
    between the ends, the change lies within [min, max] of (end derivative x step). A change
    of several times the larger end value needs a peak of the derivative inside the interval:
    a transition crossed between the two states (a freezing pore liquid, layering), or a
    path too coarse for a sharp feature. In either case the integral across it is not
    trusted: a crossing on a metastable branch (hysteresis) integrates the wrong states, and
    a sharp peak between two nodes is not resolved. The energy is the sharper test of
    freezing (the latent heat changes u by far more than the density changes n).
    """
    b = _vec(beta_per_K, "beta_per_K")
    z = _vec(ln_z, "ln_z")
    cols = [
        _vec(a, name)
        for a, name in (
            (density_per_nm3, "density_per_nm3"),
            (density_stderr, "density_stderr"),
            (energy_K_per_nm3, "energy_K_per_nm3"),
            (energy_stderr, "energy_stderr"),
            (n_variance_per_nm3, "n_variance_per_nm3"),
            (nu_covariance_K_per_nm3, "nu_covariance_K_per_nm3"),
            (u_variance_K2_per_nm3, "u_variance_K2_per_nm3"),
        )
    ]
    m = b.size
    if m < 2 or z.size != m or any(c.size != m for c in cols):
        raise InputError("path: every field needs the same length (>= 2)")
    n, sn, u, su, vn, cnu, vu = cols
    out = np.full((m - 1, 2), np.nan)
    for i in range(m - 1):
        k = i + 1
        if b[k] == b[i] and z[k] != z[i]:
            dx, slopes = z[k] - z[i], ((vn[i], vn[k]), (cnu[i], cnu[k]))
        elif z[k] == z[i] and b[k] != b[i]:
            dx, slopes = b[k] - b[i], ((-cnu[i], -cnu[k]), (-vu[i], -vu[k]))
        else:
            continue
        for q, (mean, err, (d0, d1)) in enumerate(((n, sn, slopes[0]), (u, su, slopes[1]))):
            if not all(np.isfinite(v) for v in (mean[i], mean[k], d0, d1)):
                continue
            noise = PATH_JUMP_Z * float(np.hypot(np.nan_to_num(err[i]), np.nan_to_num(err[k])))
            excess = abs(mean[k] - mean[i]) - noise
            bound = max(abs(d0), abs(d1)) * abs(dx)
            if excess <= 0:
                out[i, q] = 0.0
            else:
                out[i, q] = excess / bound if bound > 0 else np.inf
    return out


def worst_path_jump(ratios: np.ndarray) -> PathJump | None:
    """The interval and quantity of the largest ratio of :func:`path_jumps` when it exceeds
    PATH_JUMP_FACTOR; None for a path without a jump (or without fluctuations to judge)."""
    r = np.asarray(ratios, float)
    if r.size == 0 or not np.any(np.isfinite(r)):
        return None
    i, q = np.unravel_index(int(np.nanargmax(r)), r.shape)
    if not r[i, q] > PATH_JUMP_FACTOR:
        return None
    return PathJump(int(i), ("density", "energy")[int(q)], float(r[i, q]))


def describe_path_jump(jump: PathJump, temperature_K: np.ndarray, ln_z: np.ndarray) -> str:
    """The one-line reason of a pore whose anchor path has ``jump``."""
    i, k = jump.index, jump.index + 1
    t, z = np.asarray(temperature_K, float), np.asarray(ln_z, float)
    return (
        f"{PATH_JUMP}: between states {i} and {k} (T {t[i]:.4g} -> {t[k]:.4g} K, ln z "
        f"{z[i]:.4g} -> {z[k]:.4g}) the {jump.quantity} changes {jump.ratio:.3g} x what the "
        "fluctuations at both ends allow (a transition crossed, e.g. a freezing pore liquid, "
        "or a path too coarse)"
    )
