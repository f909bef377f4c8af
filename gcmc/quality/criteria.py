"""Quality checks of a kernel before it is used to invert isotherms (``gcmc check``). The
comparison of two kernels of one probe (``gcmc diff``) is in :mod:`gcmc.quality.diff`.

Every check returns a :class:`Criterion`: a verdict ("pass", "warn", "fail" or "info"), what
was measured, the thresholds it was judged by, detail lines naming the widths and pressures
concerned, and the numbers as JSON-able data. :func:`run_checks` runs them all and returns a
:class:`CheckReport`. Densities are molecules/nm^3 of pore volume inside the kernel and are
reported in mmol/cm^3 (1 nm^-3 = 1/0.602214076 mmol/cm^3). Widths are on the kernel's w axis
(the width presented to inversions) with H alongside.

Errors. Comparisons use the points' standard errors after the rule of the fitter
(:func:`gcmc.kernel.forms.effective_stderr`: a missing error is replaced by a typical one and
every error is floored at 0.1 % of the loading); "combined sigma" of two independent points is
sqrt(s1^2 + s2^2).

The criteria, in the order of the report:

1. Point and isotherm health, per temperature and accessible width
   * ``point_errors``: relative standard error s / max(n, a) against the target (a: the
     absolute noise of the noise model, so nearly empty points are judged on their absolute
     error); pass <= target, warn <= 3 target, fail above; a point without an error fails.
   * ``point_flags``: unconverged points (``converged == 0``) fail; other build flags warn.
   * ``monotonic``: the absolute loading of a pore cannot decrease with pressure
     (d<N>/d(beta mu) = var N >= 0, an exact fluctuation identity); a drop of any later point
     below an earlier one by more than 3 combined sigma fails.
   * ``fit_quality``: the stored fit, evaluated as the reader evaluates it, against the points:
     chi-square p-value (warn < 1e-3, fail < 1e-6 per isotherm), and the Wald-Wolfowitz runs
     test on the signs of the residuals (A. Wald & J. Wolfowitz, Ann. Math. Statist. 11 (1940)
     147; exact distribution of the number of runs given the numbers of + and - signs,
     one-sided: too few runs means systematic misfit; warn < 1e-3).
   * ``hysteresis``: where a desorption branch exists: the largest gap desorption - adsorption
     in combined sigma and the loop area (integral of the gap over ln p); a gap above 3 sigma
     warns (the adsorption branch is metastable there); desorption *below* adsorption by more
     than 3 sigma fails (the descending ladder starts from the fuller state).
   * ``henry``: the lowest-pressure point n_0 against the exact Henry law K_H f_0
     (KernelData.henry_per_nm3_per_pa times the fugacity). Judged only where the lowest point
     is in the Henry regime: the fit's logarithmic slope s = d ln n / d ln p at p_0 satisfies
     1 - s <= 0.2. Expected n = K_H f_0 s (exact for a Langmuir isotherm, second order in
     1 - s otherwise); fail if |n_0 - K_H f_0 s| > 3 sigma_0 + (1 - s)^2 K_H f_0.
   * ``accessibility``: the smallest accessible width; fails if an inaccessible width has a
     loading above 3 sigma, an accessible one has no Henry constant, or an inaccessible width
     lies above an accessible one.
   * ``wide_pore``: the widest pore against bulk fluid plus a surface excess: the excess per
     area Gamma = (n - rho_bulk) w should be nearly the same in the two widest pores; warns
     (never fails) where they differ by more than 10 % and by more than 3 sigma.
2. Across widths
   * ``width_outliers``: each point against the linear interpolation of the two neighbouring
     widths at the same pressure; the curvature allowance c = |P - lin| with P the polynomial
     through up to two neighbours on each side (the point itself excluded). Fail if
     |n - lin| > 5 sigma_d + 2 c, warn if > 4 sigma_d + c (sigma_d: the combined error of the
     point and the interpolation).
   * ``width_gaps``: the error of linear interpolation in width (what the reader does) at the
     middle of each interval, estimated as |P(w_mid) - (n_j + n_j+1)/2| with P the cubic
     through the four nearest widths (quadratic at the ends); fail if it exceeds
     3 sigma_mid + sigma_noise(n_mid) (the interpolated value's error plus the experiment's
     noise at that loading) at any pressure; the intervals to refine are listed.
3. ``resolving_power``: see :mod:`gcmc.quality.resolution` (definitions there). Reported,
   not judged, except a warning when no width is resolved or when ``width_gaps`` fails (the
   derivatives from a too coarse width grid are then uncertain).
4. ``round_trip``: synthetic PSDs (Gaussian modes) -> isotherms through the kernel on a width
   grid four times finer than the inversion grid (no "inverse crime"), plus noise from the
   noise model -> the reference inversion (:mod:`gcmc.quality.inversion`) on a uniform width grid,
   repeated for several noise realisations. Reported: recovered total pore volume and mode
   positions, median and spread over the realisations.
   * A PSD is *resolvable* when every mode lies in the resolved range of the resolving power
     and is at least as broad (standard deviation) as max(2 inversion grid steps, dw_2 at its
     centre), neighbouring modes are at least max(2 dw_2, 2.5 (sd1 + sd2)) apart (the reference
     inversion merges modes whose dip is shallow: measured), and the true PSD shows one maximum
     per mode.
   * A recovered peak counts for a mode when it lies within 3 mode tolerances of it (nearest
     first); the mode tolerance is 2 dw_2(mode) (the two-pore separation) + one grid step.
   * A resolvable PSD fails when the median volume error exceeds 15 %, a mode is missed in
     half of the realisations or more, or its median position is off by more than its
     tolerance. A PSD that is not resolvable is reported as "not resolvable" and not judged.
   * Medians, because a regularised inversion with lambda chosen per realisation sometimes
     merges two modes or puts spurious volume into the widest pores (where little adsorbs per
     unit volume); a few such realisations must not decide.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
from scipy import stats

from gcmc.errors import InputError
from gcmc.kernel import flags as fl
from gcmc.kernel import forms as _forms
from gcmc.kernel.data import KernelData
from gcmc.kernel.forms import effective_stderr
from gcmc.kernel.reader import Kernel
from gcmc.physics.units import MMOL_PER_CM3_PER_NM3
from gcmc.quality.inversion import METHODS, invert, single_threaded_blas, trapezoid_weights
from gcmc.quality.resolution import (
    DEFAULT_CHI2_THRESHOLD,
    DEFAULT_RESOLUTION_FRACTION,
    NoiseModel,
    ResolvingPower,
    check_pressures,
    resolving_power,
)

VERDICTS = ("pass", "info", "warn", "fail")
_RANK = {"pass": 0, "info": 0, "warn": 1, "fail": 2}

# thresholds (documented in the module docstring)
ERROR_WARN_FACTOR = 3.0
MONOTONIC_SIGMA = 3.0
FIT_P_WARN = 1e-3
FIT_P_FAIL = 1e-6
RUNS_P_WARN = 1e-3
HYSTERESIS_SIGMA = 3.0
HENRY_SLOPE_MAX = 0.2
# 4 sigma: the zero-pressure extrapolation is judged at every accessible width (up to ~60);
# a right kernel then fails somewhere with a chance below 0.4 % (normal errors)
HENRY_SIGMA = 4.0
WIDE_PORE_REL = 0.10
WIDE_PORE_SIGMA = 3.0
OUTLIER_FAIL = (5.0, 2.0)  # sigma factor, curvature factor
OUTLIER_WARN = (4.0, 1.0)
GAP_SIGMA = 3.0
ROUND_TRIP_VOLUME_TOL = 0.15
ROUND_TRIP_MODE_PAIRS = 2.0
ROUND_TRIP_FOUND_FRACTION = 0.5
ROUND_TRIP_SEPARATION = 2.5
ROUND_TRIP_MATCH_WINDOW = 3.0
MIN_MODE_STEPS = 2.0
MODE_PEAK_FRACTION = 0.1


# --------------------------------------------------------------------------------------------
# result types
# --------------------------------------------------------------------------------------------
@dataclass
class Criterion:
    """One criterion of the check: its verdict (pass, info, warn, fail), what was measured
    against which threshold, and the details."""

    key: str
    title: str
    verdict: str
    measured: str
    threshold: str
    details: list[str] = field(default_factory=list)
    data: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class SyntheticPSD:
    """A PSD made of Gaussian modes (centre w in nm, standard deviation in nm, volume
    fraction); the fractions are normalised to 1."""

    name: str
    modes: tuple[tuple[float, float, float], ...]

    def __post_init__(self) -> None:
        if not self.modes:
            raise InputError(f"synthetic PSD {self.name!r}: needs at least one mode")
        for c, s, a in self.modes:
            if not (np.isfinite(c) and np.isfinite(s) and np.isfinite(a)) or s <= 0 or a <= 0:
                raise InputError(
                    f"synthetic PSD {self.name!r}: modes need finite centre, "
                    "standard deviation > 0 and fraction > 0"
                )

    def shape(self, w: np.ndarray) -> np.ndarray:
        """Un-normalised density at widths w (nm)."""
        total = sum(a for _, _, a in self.modes)
        out = np.zeros_like(np.asarray(w, dtype=float))
        for c, s, a in self.modes:
            out += (a / total) * np.exp(-0.5 * ((w - c) / s) ** 2) / (s * math.sqrt(2 * math.pi))
        return out

    @property
    def centres(self) -> list[float]:
        """The modes' centres (nm), sorted."""
        return sorted(c for c, _, _ in self.modes)


@dataclass
class RoundTrip:
    """A synthetic round trip: a PSD through the kernel and back by the reference inversion."""

    temperature_K: float
    psd: SyntheticPSD
    resolvable: bool
    why: str
    widths_nm: np.ndarray  # inversion grid (w)
    true_psd: np.ndarray  # on the inversion grid, cm3/g/nm
    recovered: np.ndarray  # (realisations, widths)
    volume_true: float
    volume_recovered: np.ndarray  # per realisation
    modes_true: list[float]
    modes_recovered: list[list[float]]  # per realisation: the peak matched to each true mode
    mode_tolerances: list[float]
    lambdas: np.ndarray
    verdict: str
    failures: list[str]

    def recovered_band(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Median and 16 / 84 % quantiles of the recovered PSD over the realisations."""
        q = np.percentile(self.recovered, [16, 50, 84], axis=0)
        return q[1], q[0], q[2]

    @property
    def volume_rel_error(self) -> tuple[float, float]:
        """Median relative error of the recovered pore volume over the realisations and half
        the 16-84 % range (robust: a few realisations put spurious volume into the widest
        pores, where little adsorbs per unit volume)."""
        e = self.volume_recovered / self.volume_true - 1.0
        lo, hi = np.percentile(e, [16, 84])
        return float(np.median(e)), float(0.5 * (hi - lo))

    def mode_errors(self) -> list[tuple[float, float, int]]:
        """Per true mode: (median error, half the 16-84 % range, realisations in which it was
        found)."""
        out = []
        for i, c in enumerate(self.modes_true):
            found = np.array([m[i] for m in self.modes_recovered if np.isfinite(m[i])])
            if found.size == 0:
                out.append((float("nan"), float("nan"), 0))
            else:
                lo, hi = np.percentile(found, [16, 84])
                out.append((float(np.median(found) - c), float(0.5 * (hi - lo)), int(found.size)))
        return out


#: The settings of how a check judges (not of the measurement), after ``target_rel_stderr``:
#: shared by a set's settings and written in that order in the reports.
JUDGING_FIELDS = (
    "chi2_threshold",
    "resolution_fraction",
    "realisations",
    "seed",
    "pore_volume_cm3_g",
    "inversion_method",
)


@dataclass
class CheckSettings:
    """Options of :func:`run_checks` (the CLI's options, with the same defaults)."""

    target_rel_stderr: float = 0.02
    noise: NoiseModel = field(default_factory=NoiseModel)
    pressures_Pa: np.ndarray | None = None  # None: the kernel's own at each temperature
    temperatures_K: tuple[float, ...] | None = None  # None: every kernel temperature
    chi2_threshold: float = DEFAULT_CHI2_THRESHOLD
    resolution_fraction: float = DEFAULT_RESOLUTION_FRACTION
    realisations: int = 12
    seed: int = 2026
    pore_volume_cm3_g: float = 0.5
    inversion_method: str = "gcv"
    psds: tuple[SyntheticPSD, ...] | None = None  # None: default_psds() per kernel

    def validate(self) -> None:
        """Raise InputError naming the first setting out of range."""
        if not (np.isfinite(self.target_rel_stderr) and self.target_rel_stderr > 0):
            raise InputError(
                f"target_rel_stderr (--target-rel-stderr): must be > 0, got "
                f"{self.target_rel_stderr}"
            )
        if self.realisations < 2:
            raise InputError(f"realisations: need at least 2, got {self.realisations}")
        if not (np.isfinite(self.pore_volume_cm3_g) and self.pore_volume_cm3_g > 0):
            raise InputError("pore volume: must be > 0 cm3/g")
        if self.inversion_method not in METHODS:
            raise InputError(f"--inversion: must be one of {', '.join(METHODS)}")

    def to_dict(self, measurement: bool = True) -> dict[str, Any]:
        """The settings as written in a report's ``settings`` (not yet JSON-ready).

        Parameters
        ----------
        measurement : bool
            Include the measurement's ``noise`` and ``pressures_Pa``; False for a set's
            report, whose members carry their own.

        Returns
        -------
        dict
            The settings by name; ``temperatures_K`` and ``psds`` are not written.
        """
        out: dict[str, Any] = {"target_rel_stderr": self.target_rel_stderr}
        if measurement:
            out["noise"] = {
                "relative": self.noise.relative,
                "absolute_mmol_cm3": self.noise.absolute_mmol_cm3,
                "model": self.noise.describe(),
            }
            out["pressures_Pa"] = None if self.pressures_Pa is None else list(self.pressures_Pa)
        out.update({name: getattr(self, name) for name in JUDGING_FIELDS})
        return out


@dataclass
class CheckReport:
    """The result of checking one kernel: criteria, resolving power, round trips."""

    kernel_name: str
    kernel_version: int
    path: str
    settings: CheckSettings
    criteria: list[Criterion]
    resolving: list[ResolvingPower]
    round_trips: list[RoundTrip]

    @property
    def verdict(self) -> str:
        """The worst verdict of the criteria."""
        worst = max((_RANK[c.verdict] for c in self.criteria), default=0)
        return {0: "pass", 1: "warn", 2: "fail"}[worst]

    @property
    def exit_code(self) -> int:
        """The command's exit code: 1 on fail, else 0."""
        return 1 if self.verdict == "fail" else 0

    def criterion(self, key: str) -> Criterion:
        """The criterion with this key (KeyError if none)."""
        for c in self.criteria:
            if c.key == key:
                return c
        raise KeyError(key)

    def to_dict(self) -> dict[str, Any]:
        """The report as JSON-ready dict (check.json)."""
        return jsonable(
            {
                "kernel": {
                    "name": self.kernel_name,
                    "version": self.kernel_version,
                    "path": self.path,
                },
                "verdict": self.verdict,
                "settings": self.settings.to_dict(),
                "criteria": [asdict(c) for c in self.criteria],
            }
        )


def jsonable(x: Any) -> Any:
    """Plain Python values for JSON: numpy scalars and arrays unpacked, NaN and inf -> None
    (an unavailable number); dict keys as str.

    Parameters
    ----------
    x : Any
        A value, possibly nested dicts, lists and tuples.

    Returns
    -------
    Any
        The same structure with only JSON-ready values.
    """
    if isinstance(x, dict):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return jsonable(x.tolist())
    if isinstance(x, np.generic):
        return jsonable(x.item())
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def _worst(verdicts: list[str]) -> str:
    return max(verdicts, key=lambda v: _RANK[v]) if verdicts else "pass"


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------
def as_kernel(kernel: Kernel | KernelData) -> Kernel:
    return kernel if isinstance(kernel, Kernel) else Kernel(kernel)


def _label(kernel: Kernel) -> str:
    return str(kernel.path) if kernel.path is not None else f"kernel {kernel.name!r}"


def _mmol(x: float) -> float:
    return float(x) * MMOL_PER_CM3_PER_NM3


def _where(data: KernelData, t: int, j: int, k: int | None = None) -> str:
    s = (
        f"T = {data.temperatures_K[t]:g} K, w = {data.widths_w_nm[j]:.4g} nm "
        f"(H = {data.widths_H_nm[j]:.4g})"
    )
    if k is not None:
        s += f", p = {data.pressures_Pa[t, k]:.4g} Pa"
    return s


def _sigma_row(n: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Effective errors (the fitter's rule) for the finite entries of one isotherm."""
    out = np.full(n.shape, np.nan)
    ok = np.isfinite(n)
    if np.any(ok):
        out[ok] = effective_stderr(n[ok], s[ok])
    return out


def _branch_arrays(data: KernelData, branch: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    pts = data.points[branch]
    n = np.asarray(pts["density_per_nm3"], dtype=float)
    s = np.asarray(pts["density_per_nm3_stderr"], dtype=float)
    sig = np.full(n.shape, np.nan)
    for t in range(n.shape[0]):
        for j in range(n.shape[1]):
            sig[t, j] = _sigma_row(n[t, j], s[t, j])
    return n, s, sig


def _temperature_indices(kernel: Kernel, temperatures: tuple[float, ...] | None) -> list[int]:
    if temperatures is None:
        return list(range(len(kernel.data.temperatures_K)))
    return [kernel.temperature_index(float(x)) for x in temperatures]


def runs_test(signs: np.ndarray) -> tuple[int, int, int, float]:
    """Wald-Wolfowitz runs test on a sequence of signs (+1/-1; zeros dropped).

    Returns (runs, n_plus, n_minus, p) with p = P(R <= runs | n_plus, n_minus) from the exact
    distribution of the number of runs (Wald & Wolfowitz 1940): for R = 2k,
    P = 2 C(n1-1, k-1) C(n2-1, k-1) / C(n1+n2, n1); for R = 2k+1,
    P = [C(n1-1, k) C(n2-1, k-1) + C(n1-1, k-1) C(n2-1, k)] / C(n1+n2, n1).
    p = 1 when one of the signs does not occur (the test is then undefined)."""
    x = np.sign(np.asarray(signs, dtype=float))
    x = x[x != 0]
    n1, n2 = int(np.sum(x > 0)), int(np.sum(x < 0))
    if n1 == 0 or n2 == 0:
        return (1 if x.size else 0), n1, n2, 1.0
    runs = 1 + int(np.count_nonzero(x[1:] != x[:-1]))
    total = math.comb(n1 + n2, n1)

    def pmf(r: int) -> float:
        k = r // 2
        if r % 2 == 0:
            return 2.0 * math.comb(n1 - 1, k - 1) * math.comb(n2 - 1, k - 1) / total
        return (
            math.comb(n1 - 1, k) * math.comb(n2 - 1, k - 1)
            + math.comb(n1 - 1, k - 1) * math.comb(n2 - 1, k)
        ) / total

    p = sum(pmf(r) for r in range(2, runs + 1))
    return runs, n1, n2, float(min(p, 1.0))


def _lagrange(xs: np.ndarray, ys: np.ndarray, x: float) -> np.ndarray:
    """Value at x of the polynomial through (xs, ys[i]) (ys rows: one per node)."""
    out = np.zeros(ys.shape[1:])
    for i, xi in enumerate(xs):
        li = 1.0
        for m, xm in enumerate(xs):
            if m != i:
                li *= (x - xm) / (xi - xm)
        out = out + li * ys[i]
    return out


# --------------------------------------------------------------------------------------------
# 1. point and isotherm health
# --------------------------------------------------------------------------------------------
def check_point_errors(kernel: Kernel, settings: CheckSettings, ts: list[int]) -> Criterion:
    """``point_errors``: relative standard errors of the points against the target."""
    data = kernel.data
    target = settings.target_rel_stderr
    floor = settings.noise.absolute_mmol_cm3 / MMOL_PER_CM3_PER_NM3
    pts = data.points["adsorption"]
    n = np.asarray(pts["density_per_nm3"], float)
    s = np.asarray(pts["density_per_nm3_stderr"], float)
    worst = (0.0, None)
    above, missing, judged = [], [], 0
    for t in ts:
        for j in np.flatnonzero(data.accessible[t]):
            for k in np.flatnonzero(np.isfinite(n[t, j])):
                judged += 1
                if not (np.isfinite(s[t, j, k]) and s[t, j, k] > 0.0):
                    if n[t, j, k] > 0.0:
                        missing.append(_where(data, t, j, k))
                    continue
                rel = s[t, j, k] / max(n[t, j, k], floor)
                if rel > worst[0]:
                    worst = (rel, (t, j, k))
                if rel > target:
                    above.append((rel, _where(data, t, j, k)))
    verdict = "pass"
    if worst[0] > target:
        verdict = "warn"
    if worst[0] > ERROR_WARN_FACTOR * target or missing:
        verdict = "fail"
    details = [f"error not estimated: {w}" for w in missing[:10]]
    details += [f"rel. error {r:.3g}: {w}" for r, w in sorted(above, reverse=True)[:10]]
    where = _where(data, *worst[1]) if worst[1] is not None else "-"
    return Criterion(
        key="point_errors",
        title="relative standard errors",
        verdict=verdict,
        measured=(
            f"worst {worst[0]:.3g} at {where}; {len(above)} of {judged} points above "
            f"target; {len(missing)} without error"
        ),
        threshold=(
            f"s/max(n, {settings.noise.absolute_mmol_cm3:g} mmol/cm3): pass <= "
            f"{target:g}, warn <= {ERROR_WARN_FACTOR * target:g}, fail above or "
            "error missing"
        ),
        details=details,
        data={
            "worst": worst[0],
            "n_above_target": len(above),
            "n_missing": len(missing),
            "n_points": judged,
        },
    )


def check_flags(kernel: Kernel, ts: list[int]) -> Criterion:
    """``point_flags``: points flagged at build; unconverged ones fail, other flags warn."""
    data = kernel.data
    unconverged, flagged = [], []
    for branch, pts in data.points.items():
        conv = np.asarray(pts.get("converged", np.ones_like(pts["density_per_nm3"])), float)
        n = np.asarray(pts["density_per_nm3"], float)
        flags = data.flags.get(branch)
        for t in ts:
            for j in np.flatnonzero(data.accessible[t]):
                for k in np.flatnonzero(np.isfinite(n[t, j])):
                    text = str(flags[t, j, k]) if flags is not None else ""
                    items = fl.without(text, fl.INACCESSIBLE)
                    where = f"{branch}: {_where(data, t, j, k)}"
                    if conv[t, j, k] == 0:
                        unconverged.append(f"{where}: {'; '.join(items) or 'not converged'}")
                    elif items:
                        flagged.append(f"{where}: {'; '.join(items)}")
    verdict = "fail" if unconverged else ("warn" if flagged else "pass")
    return Criterion(
        key="point_flags",
        title="points flagged at build",
        verdict=verdict,
        measured=f"{len(unconverged)} unconverged, {len(flagged)} other flagged",
        threshold="fail: any point with converged == 0; warn: any other build flag",
        details=(unconverged + flagged)[:20],
        data={"n_unconverged": len(unconverged), "n_flagged": len(flagged)},
    )


def check_monotonic(kernel: Kernel, ts: list[int]) -> Criterion:
    """``monotonic``: no later point below an earlier one by more than 3 combined sigma."""
    data = kernel.data
    worst = (0.0, "")
    fails = []
    for branch in data.points:
        n, _, sig = _branch_arrays(data, branch)
        for t in ts:
            p = np.asarray(data.pressures_Pa[t], float)
            for j in np.flatnonzero(data.accessible[t]):
                ok = np.flatnonzero(np.isfinite(n[t, j]) & np.isfinite(p))
                ok = ok[np.argsort(p[ok])]
                x, e = n[t, j, ok], sig[t, j, ok]
                if x.size < 2:
                    continue
                drop = x[:, None] - x[None, :]  # earlier minus later
                comb = np.sqrt(e[:, None] ** 2 + e[None, :] ** 2)
                z = np.triu(drop / comb, k=1)
                i, m = np.unravel_index(int(np.argmax(z)), z.shape)
                zmax = float(z[i, m])
                if zmax > worst[0]:
                    worst = (
                        zmax,
                        f"{branch}: {_where(data, t, j)}: n falls from "
                        f"{_mmol(x[i]):.4g} at {p[ok[i]]:.4g} Pa to {_mmol(x[m]):.4g}"
                        f" mmol/cm3 at {p[ok[m]]:.4g} Pa ({zmax:.1f} sigma)",
                    )
                if zmax > MONOTONIC_SIGMA:
                    fails.append(
                        f"{branch}: {_where(data, t, j)}: drop of {zmax:.1f} sigma "
                        f"between {p[ok[i]]:.4g} and {p[ok[m]]:.4g} Pa"
                    )
    return Criterion(
        key="monotonic",
        title="loading non-decreasing with pressure",
        verdict="fail" if fails else "pass",
        measured=f"largest drop {worst[0]:.2f} sigma" + (f" ({worst[1]})" if worst[1] else ""),
        threshold=f"fail: any later point below an earlier one by > {MONOTONIC_SIGMA:g} "
        "combined sigma",
        details=fails[:20],
        data={"largest_drop_sigma": worst[0], "n_isotherms_failed": len(fails)},
    )


def check_fits(kernel: Kernel, ts: list[int]) -> Criterion:
    """``fit_quality``: chi-square p-value and runs test of the stored fit against the points."""
    data = kernel.data
    n, _, sig = _branch_arrays(data, "adsorption")
    worst_p, worst_where, worst_runs = 1.0, "", 1.0
    lines, rows, interpolants = [], [], []
    verdicts = []
    for t in ts:
        p = np.asarray(data.pressures_Pa[t], float)
        acc = np.flatnonzero(data.accessible[t])
        for j in acc:
            rec = data.fits[t][j]
            ok = np.isfinite(n[t, j]) & np.isfinite(p) & (p > 0)
            if rec.form == _forms.ZERO_FORM or np.count_nonzero(ok) < 2:
                continue
            fit = kernel.evaluate(p[ok], [data.widths_w_nm[j]], float(data.temperatures_K[t]))
            r = (n[t, j, ok] - fit[:, 0]) / sig[t, j, ok]
            chi2 = float(np.sum(r * r))
            k_par = int(np.asarray(rec.parameters).size)
            dof = int(rec.dof) if rec.dof > 0 else max(int(np.count_nonzero(ok)) - k_par, 1)
            pval = float(stats.chi2.sf(chi2, dof))
            runs, n1, n2, p_runs = runs_test(r)
            rows.append(
                {
                    "T_K": float(data.temperatures_K[t]),
                    "w_nm": float(data.widths_w_nm[j]),
                    "form": rec.form,
                    "chi2": chi2,
                    "dof": dof,
                    "reduced_chi2": chi2 / dof,
                    "p_value": pval,
                    "runs": runs,
                    "runs_p": p_runs,
                }
            )
            if rec.form == _forms.INTERPOLANT_FORM:
                interpolants.append(_where(data, t, j))
            v = "pass"
            if pval < FIT_P_WARN or p_runs < RUNS_P_WARN:
                v = "warn"
            if pval < FIT_P_FAIL:
                v = "fail"
            verdicts.append(v)
            if v != "pass":
                lines.append(
                    f"{v}: {_where(data, t, j)}: {rec.form}, chi2/dof = {chi2:.1f}/{dof}"
                    f" (p = {pval:.2g}), {runs} runs of {n1}+/{n2}- (p = {p_runs:.2g})"
                )
            if pval < worst_p:
                worst_p, worst_where = (
                    pval,
                    f"{_where(data, t, j)} ({rec.form}, chi2/dof = {chi2 / dof:.2f})",
                )
            worst_runs = min(worst_runs, p_runs)
    if interpolants:
        lines.append(
            f"no correlating form accepted (monotone interpolant) at "
            f"{len(interpolants)} width(s): {'; '.join(interpolants[:5])}"
        )
    return Criterion(
        key="fit_quality",
        title="fit chi2 and residual runs",
        verdict=_worst(verdicts),
        measured=f"lowest chi2 p-value {worst_p:.3g} at {worst_where or '-'}; lowest runs "
        f"p-value {worst_runs:.3g}",
        threshold=(
            f"per isotherm, chi2 p-value: warn < {FIT_P_WARN:g}, fail < {FIT_P_FAIL:g}; "
            f"Wald-Wolfowitz runs test (exact, too few runs): warn < {RUNS_P_WARN:g}"
        ),
        details=lines[:20],
        data={"isotherms": rows},
    )


def check_hysteresis(kernel: Kernel, ts: list[int]) -> Criterion:
    """``hysteresis``: desorption against adsorption, where both branches were run."""
    data = kernel.data
    if "desorption" not in data.points:
        return Criterion(
            key="hysteresis",
            title="adsorption vs desorption",
            verdict="info",
            measured="no desorption branch in this kernel",
            threshold=f"warn: gap > {HYSTERESIS_SIGMA:g} sigma; fail: desorption "
            f"below adsorption by > {HYSTERESIS_SIGMA:g} sigma",
        )
    na, _, sa = _branch_arrays(data, "adsorption")
    nd, _, sd = _branch_arrays(data, "desorption")
    top, low = (0.0, ""), (0.0, "")
    warn, fail, rows = [], [], []
    for t in ts:
        p = np.asarray(data.pressures_Pa[t], float)
        for j in np.flatnonzero(data.accessible[t]):
            ok = np.isfinite(na[t, j]) & np.isfinite(nd[t, j]) & (p > 0)
            if np.count_nonzero(ok) < 1:
                continue
            order = np.argsort(p[ok])
            gap = (nd[t, j, ok] - na[t, j, ok])[order]
            z = gap / np.sqrt(sa[t, j, ok] ** 2 + sd[t, j, ok] ** 2)[order]
            lp = np.log(p[ok][order])
            area = float(np.trapezoid(gap, lp)) if gap.size > 1 else 0.0
            rows.append(
                {
                    "T_K": float(data.temperatures_K[t]),
                    "w_nm": float(data.widths_w_nm[j]),
                    "max_gap_sigma": float(np.max(z)),
                    "min_gap_sigma": float(np.min(z)),
                    "loop_area_mmol_cm3_lnp": _mmol(area),
                }
            )
            where = _where(data, t, j)
            if np.max(z) > top[0]:
                top = (float(np.max(z)), where)
            if np.min(z) < low[0]:
                low = (float(np.min(z)), where)
            if np.max(z) > HYSTERESIS_SIGMA:
                warn.append(
                    f"hysteresis at {where}: max gap {np.max(z):.1f} sigma, loop area "
                    f"{_mmol(area):.3g} mmol/cm3 (x ln p)"
                )
            if np.min(z) < -HYSTERESIS_SIGMA:
                fail.append(f"desorption below adsorption at {where}: {np.min(z):.1f} sigma")
    verdict = "fail" if fail else ("warn" if warn else "pass")
    return Criterion(
        key="hysteresis",
        title="adsorption vs desorption",
        verdict=verdict,
        measured=f"largest gap {top[0]:.2f} sigma{f' ({top[1]})' if top[1] else ''}; most "
        f"negative {low[0]:.2f} sigma",
        threshold=f"warn: desorption above adsorption by > {HYSTERESIS_SIGMA:g} sigma "
        f"(hysteresis); fail: below by > {HYSTERESIS_SIGMA:g} sigma",
        details=(fail + warn)[:20],
        data={"isotherms": rows},
    )


def henry_intercept(
    n: np.ndarray, sig: np.ndarray, f: np.ndarray, henry: float
) -> tuple[float, float, float, float]:
    """The zero-pressure limit of r = n / (K_H f) from the two lowest points of one isotherm.

    The exact low-pressure limit is r(0) = 1. r is extrapolated to f = 0 linearly in f (exact
    for n = K_H f (1 + a f), the second-virial form) and 1/r linearly in f (exact for the
    Langmuir form n = K_H f / (1 + b f)); the estimate is their mean and the model allowance
    their difference. Returns (estimate, its standard error from the points' errors, model
    allowance, secant log-slope d ln n / d ln f between the two points); NaNs where undefined
    (fewer than two points, no molecules, no Henry constant)."""
    nan = (float("nan"),) * 4
    if n.size < 2 or not (henry > 0) or not np.all(n[:2] > 0) or not f[1] > f[0] > 0:
        return nan
    r = n[:2] / (henry * f[:2])
    sr = sig[:2] / (henry * f[:2])
    c = f[0] / (f[1] - f[0])
    from_r = float(r[0] - c * (r[1] - r[0]))
    q = 1.0 / r
    from_q = float(q[0] - c * (q[1] - q[0]))
    if not (from_q > 0):
        return nan
    est = 0.5 * (from_r + 1.0 / from_q)
    se = float(np.hypot(sr[0] * (1.0 + c), sr[1] * c))
    slope = float(math.log(n[1] / n[0]) / math.log(f[1] / f[0]))
    return est, se, abs(from_r - 1.0 / from_q), slope


def check_henry(kernel: Kernel, ts: list[int]) -> Criterion:
    """``henry``: the two lowest points, extrapolated to zero pressure, against the exact Henry
    constant, where they are in the Henry regime."""
    data = kernel.data
    n, _, sig = _branch_arrays(data, "adsorption")
    fails, rows, skipped = [], [], []
    worst = (0.0, "")
    for t in ts:
        p = np.asarray(data.pressures_Pa[t], float)
        f = np.asarray(data.fugacities_Pa[t], float)
        for j in np.flatnonzero(data.accessible[t]):
            ok = np.flatnonzero(np.isfinite(n[t, j]) & np.isfinite(p) & (p > 0) & np.isfinite(f))
            ok = ok[np.argsort(p[ok])][:2]
            if ok.size == 0:
                continue
            k = int(ok[0])
            kh = float(data.henry_per_nm3_per_pa[t, j])
            where = _where(data, t, j, k)
            est, se, allow, s = henry_intercept(n[t, j, ok], sig[t, j, ok], f[ok], kh)
            if not np.isfinite(est):
                skipped.append(f"{where}: fewer than two points with molecules")
                continue
            if abs(1.0 - s) > HENRY_SLOPE_MAX:
                skipped.append(
                    f"{where}: log-slope {s:.3g} to the next point, beyond the Henry regime"
                )
                continue
            tol = HENRY_SIGMA * se + allow
            dev = est - 1.0
            ratio = abs(dev) / tol if tol > 0 else float("inf")
            lin = kh * f[k]
            rows.append(
                {
                    "T_K": float(data.temperatures_K[t]),
                    "w_nm": float(data.widths_w_nm[j]),
                    "p_Pa": float(p[k]),
                    "n_mmol_cm3": _mmol(n[t, j, k]),
                    "henry_mmol_cm3": _mmol(lin),
                    "zero_pressure_ratio": est,
                    "zero_pressure_ratio_stderr": se,
                    "model_allowance": allow,
                    "log_slope": s,
                    "deviation_sigma": dev / se if se > 0 else float("inf"),
                    "ratio_to_tolerance": ratio,
                }
            )
            text = (
                f"{where}: n / (K_H f) extrapolated to p = 0 is {est:.4f} +- {se:.4f} "
                f"(exact Henry law: 1; K_H = {kh:.4g} /nm3/Pa, lowest point "
                f"{_mmol(n[t, j, k]):.4g} vs K_H f = {_mmol(lin):.4g} mmol/cm3)"
            )
            if ratio > worst[0]:
                worst = (ratio, text)
            if ratio > 1.0:
                fails.append(f"{text}: off by {dev / se:+.1f} sigma" if se > 0 else text)
    verdict = "fail" if fails else ("pass" if rows else "info")
    return Criterion(
        key="henry",
        title="lowest points vs exact Henry constant",
        verdict=verdict,
        measured=(
            f"{len(rows)} width(s) judged, {len(skipped)} beyond the Henry regime; "
            f"worst {worst[0]:.2f} x tolerance" + (f" ({worst[1]})" if worst[1] else "")
        ),
        threshold=(
            f"judged where |1 - d ln n / d ln f| <= {HENRY_SLOPE_MAX:g} between the two lowest "
            f"points; fail: |r(0) - 1| > {HENRY_SIGMA:g} sigma + model allowance (r = n / K_H f "
            "extrapolated to f = 0, linearly in r and in 1/r; the allowance is their difference)"
        ),
        details=(fails + skipped)[:20],
        data={"widths": rows, "n_skipped": len(skipped)},
    )


def check_accessibility(kernel: Kernel, ts: list[int]) -> Criterion:
    """``accessibility``: inaccessible widths empty and below the accessible ones, which have a
    Henry constant."""
    data = kernel.data
    n, _, sig = _branch_arrays(data, "adsorption")
    fails, smallest = [], []
    for t in ts:
        acc = np.asarray(data.accessible[t], bool)
        idx = np.flatnonzero(acc)
        if idx.size == 0:
            fails.append(f"T = {data.temperatures_K[t]:g} K: no accessible width")
            continue
        j0 = int(idx[0])
        smallest.append(
            {
                "T_K": float(data.temperatures_K[t]),
                "w_nm": float(data.widths_w_nm[j0]),
                "H_nm": float(data.widths_H_nm[j0]),
            }
        )
        if np.any(~acc[j0:]):
            bad = j0 + int(np.flatnonzero(~acc[j0:])[0])
            fails.append(
                f"{_where(data, t, bad)}: inaccessible above the accessible width "
                f"w = {data.widths_w_nm[j0]:.4g} nm"
            )
        for j in np.flatnonzero(~acc):
            x, e = n[t, j], sig[t, j]
            okk = np.isfinite(x)
            if np.any(x[okk] > HYSTERESIS_SIGMA * np.maximum(e[okk], 0)) and np.any(x[okk] > 0):
                fails.append(
                    f"{_where(data, t, j)}: marked inaccessible but loaded "
                    f"(up to {_mmol(np.nanmax(x)):.3g} mmol/cm3)"
                )
        for j in idx:
            kh = float(data.henry_per_nm3_per_pa[t, j])
            if not (np.isfinite(kh) and kh > 0):
                fails.append(f"{_where(data, t, j)}: accessible but Henry constant {kh:g}")
    measured = (
        "; ".join(
            f"T = {s['T_K']:g} K: w = {s['w_nm']:.4g} nm (H = {s['H_nm']:.4g})" for s in smallest
        )
        or "-"
    )
    return Criterion(
        key="accessibility",
        title="smallest accessible width",
        verdict="fail" if fails else "pass",
        measured=f"smallest accessible: {measured}",
        threshold="fail: loaded inaccessible width, accessible width without Henry constant, or "
        "an inaccessible width above an accessible one",
        details=fails[:20],
        data={"smallest_accessible": smallest},
    )


def check_wide_pore(kernel: Kernel, ts: list[int]) -> Criterion:
    """``wide_pore``: the surface excess per area of the two widest pores against each other."""
    data = kernel.data
    n, _, sig = _branch_arrays(data, "adsorption")
    lines, rows = [], []
    warned = False
    for t in ts:
        idx = np.flatnonzero(data.accessible[t])
        if idx.size < 2:
            continue
        a, b = int(idx[-2]), int(idx[-1])
        wa, wb = float(data.widths_w_nm[a]), float(data.widths_w_nm[b])
        rho = np.asarray(data.bulk_density_per_nm3[t], float)
        ok = np.isfinite(n[t, a]) & np.isfinite(n[t, b]) & np.isfinite(rho)
        if not np.any(ok):
            continue
        ga = (n[t, a, ok] - rho[ok]) * wa
        gb = (n[t, b, ok] - rho[ok]) * wb
        eg = np.hypot(sig[t, a, ok] * wa, sig[t, b, ok] * wb)
        scale = np.maximum(np.abs(ga), np.abs(gb))
        with np.errstate(divide="ignore", invalid="ignore"):
            rel = np.where(scale > 0, np.abs(gb - ga) / scale, 0.0)
        significant = np.abs(gb - ga) > WIDE_PORE_SIGMA * eg
        relevant = scale > WIDE_PORE_SIGMA * eg
        bad = significant & relevant & (rel > WIDE_PORE_REL)
        worst = float(np.max(np.where(relevant, rel, 0.0)))
        ratio_bulk = float(n[t, b, ok][-1] / rho[ok][-1]) if rho[ok][-1] > 0 else float("nan")
        rows.append(
            {
                "T_K": float(data.temperatures_K[t]),
                "w_nm": [wa, wb],
                "max_rel_difference": worst,
                "excess_per_area_widest_per_nm2": gb.tolist(),
                "widest_over_bulk_at_top_pressure": ratio_bulk,
            }
        )
        lines.append(
            f"T = {data.temperatures_K[t]:g} K: excess per area n_ex w differs by up to "
            f"{100 * worst:.1f} % between w = {wa:.4g} and {wb:.4g} nm; widest pore "
            f"holds {ratio_bulk:.3g} x the bulk density at the top pressure"
        )
        if np.any(bad):
            warned = True
            lines.append(
                f"T = {data.temperatures_K[t]:g} K: the widest pores are not yet near "
                f"the bulk-plus-surface-excess limit (beyond {100 * WIDE_PORE_REL:g} % "
                f"and {WIDE_PORE_SIGMA:g} sigma at {int(np.sum(bad))} pressure(s))"
            )
    return Criterion(
        key="wide_pore",
        title="widest pore vs bulk + surface excess",
        verdict="warn" if warned else ("pass" if rows else "info"),
        measured=lines[0] if lines else "fewer than 2 accessible widths",
        threshold=f"warn only: n_ex w of the two widest pores differs by > {100 * WIDE_PORE_REL:g}"
        f" % and > {WIDE_PORE_SIGMA:g} sigma",
        details=lines[1:],
        data={"temperatures": rows},
    )


# --------------------------------------------------------------------------------------------
# 2. across widths
# --------------------------------------------------------------------------------------------
def _neighbours(idx: np.ndarray, pos: int, below: int, above: int) -> np.ndarray:
    lo = idx[max(pos - below, 0) : pos]
    hi = idx[pos + 1 : pos + 1 + above]
    return np.concatenate([lo, hi])


def check_width_outliers(kernel: Kernel, ts: list[int]) -> Criterion:
    """``width_outliers``: each point against the interpolation of its neighbouring widths."""
    data = kernel.data
    n, _, sig = _branch_arrays(data, "adsorption")
    w_all = np.asarray(data.widths_w_nm, float)
    fails, warns = [], []
    worst = (0.0, "")
    for t in ts:
        idx = np.flatnonzero(data.accessible[t])
        for pos in range(1, idx.size - 1):
            j = int(idx[pos])
            jl, jr = int(idx[pos - 1]), int(idx[pos + 1])
            a = (w_all[jr] - w_all[j]) / (w_all[jr] - w_all[jl])
            lin = a * n[t, jl] + (1 - a) * n[t, jr]
            sd = np.sqrt(sig[t, j] ** 2 + (a * sig[t, jl]) ** 2 + ((1 - a) * sig[t, jr]) ** 2)
            nb = _neighbours(idx, pos, 2, 2)
            if nb.size >= 3:
                poly = _lagrange(w_all[nb], n[t, nb], float(w_all[j]))
                curv = np.abs(poly - lin)
            else:
                curv = np.zeros_like(lin)
            d = np.abs(n[t, j] - lin)
            ok = np.isfinite(d) & np.isfinite(sd) & np.isfinite(curv)
            with np.errstate(divide="ignore", invalid="ignore"):
                score = np.where(ok, d / (OUTLIER_FAIL[0] * sd + OUTLIER_FAIL[1] * curv), 0.0)
                wscore = np.where(ok, d / (OUTLIER_WARN[0] * sd + OUTLIER_WARN[1] * curv), 0.0)
            for k in np.flatnonzero(ok):
                text = (
                    f"{_where(data, t, j, int(k))}: n = {_mmol(n[t, j, k]):.4g} vs "
                    f"neighbours' interpolation {_mmol(lin[k]):.4g} mmol/cm3 "
                    f"({d[k] / sd[k]:.1f} sigma, curvature allowance "
                    f"{curv[k] / sd[k]:.1f} sigma)"
                )
                if score[k] > 1.0:
                    fails.append(text)
                elif wscore[k] > 1.0:
                    warns.append(text)
                if score[k] > worst[0]:
                    worst = (float(score[k]), text)
    verdict = "fail" if fails else ("warn" if warns else "pass")
    return Criterion(
        key="width_outliers",
        title="outliers vs neighbouring widths",
        verdict=verdict,
        measured=f"{len(fails)} outlier(s), {len(warns)} suspect; worst {worst[0]:.2f} x the fail "
        "tolerance" + (f" ({worst[1]})" if worst[1] else ""),
        threshold=f"|n - lin| vs sigma_d and curvature allowance c: fail > {OUTLIER_FAIL[0]:g} "
        f"sigma_d + {OUTLIER_FAIL[1]:g} c, warn > {OUTLIER_WARN[0]:g} sigma_d + "
        f"{OUTLIER_WARN[1]:g} c",
        details=(fails + warns)[:20],
        data={"n_outliers": len(fails), "n_suspect": len(warns), "worst_ratio": worst[0]},
    )


@dataclass(frozen=True)
class IntervalError:
    """The interpolation error in width at the middle of one interval of accessible widths
    (``t``: temperature index; ``j``, ``j1``: its two widths): the cubic through up to four
    neighbouring widths against the linear interpolant, per pressure."""

    t: int
    j: int
    j1: int
    nodes: np.ndarray  # the widths of the cubic (indices)
    error: np.ndarray  # |cubic - linear| at the middle, nm^-3, per pressure
    tolerance: np.ndarray  # GAP_SIGMA sigma_mid + noise_scale x noise(n_mid), nm^-3
    ratio: float  # the worst error / tolerance
    worst: int  # its pressure index
    neighbour_sigma: float  # max |n_j1 - n_j| / combined sigma


def width_interval_errors(
    data: KernelData, ts: list[int], noise: NoiseModel, noise_scale: float = 1.0
) -> list[IntervalError]:
    """Every interval's mid-interval interpolation error and its tolerance: the shared
    estimate of the check's ``width_gaps`` and of the build's refinement (which scales the
    experiment's noise by the target's width tolerance). An interval with fewer than three
    widths around it has error 0; one without a finite tolerance is left out."""
    n, _, sig = _branch_arrays(data, "adsorption")
    w_all = np.asarray(data.widths_w_nm, float)
    out = []
    for t in ts:
        idx = np.flatnonzero(data.accessible[t])
        for pos in range(idx.size - 1):
            j, j1 = int(idx[pos]), int(idx[pos + 1])
            wm = 0.5 * (w_all[j] + w_all[j1])
            nodes = idx[max(pos - 1, 0) : pos + 3]
            lin = 0.5 * (n[t, j] + n[t, j1])
            diff = np.abs(n[t, j1] - n[t, j]) / np.hypot(sig[t, j], sig[t, j1])
            if nodes.size >= 3:
                err = np.abs(_lagrange(w_all[nodes], n[t, nodes], wm) - lin)
            else:
                err = np.zeros_like(lin)
            tol = (
                GAP_SIGMA * 0.5 * np.hypot(sig[t, j], sig[t, j1])
                + noise_scale * noise.sigma(_mmol(1.0) * lin) / MMOL_PER_CM3_PER_NM3
            )
            ok = np.isfinite(err) & np.isfinite(tol) & (tol > 0)
            if not np.any(ok):
                continue
            ratio = np.where(ok, err / np.where(ok, tol, 1.0), 0.0)
            k = int(np.argmax(ratio))
            out.append(
                IntervalError(t, j, j1, nodes, err, tol, float(ratio[k]), k, float(np.nanmax(diff)))
            )
    return out


def check_width_gaps(kernel: Kernel, settings: CheckSettings, ts: list[int]) -> Criterion:
    """``width_gaps``: the error of linear interpolation in width at each interval's middle."""
    data = kernel.data
    w_all = np.asarray(data.widths_w_nm, float)
    refine, rows = [], []
    worst = (0.0, "")
    for iv in width_interval_errors(data, ts, settings.noise):
        t, j, j1, k, r = iv.t, iv.j, iv.j1, iv.worst, iv.ratio
        rows.append(
            {
                "T_K": float(data.temperatures_K[t]),
                "interval_w_nm": [float(w_all[j]), float(w_all[j1])],
                "interval_H_nm": [float(data.widths_H_nm[j]), float(data.widths_H_nm[j1])],
                "interpolation_error_over_tolerance": r,
                "max_neighbour_difference_sigma": iv.neighbour_sigma,
            }
        )
        text = (
            f"T = {data.temperatures_K[t]:g} K: refine w in [{w_all[j]:.4g}, "
            f"{w_all[j1]:.4g}] nm (H in [{data.widths_H_nm[j]:.4g}, "
            f"{data.widths_H_nm[j1]:.4g}]): interpolation error at the middle "
            f"{_mmol(iv.error[k]):.3g} mmol/cm3 = {r:.1f} x tolerance at "
            f"p = {data.pressures_Pa[t, k]:.4g} Pa; neighbours differ by up to "
            f"{iv.neighbour_sigma:.0f} sigma"
        )
        if r > worst[0]:
            worst = (r, text)
        if r > 1.0:
            refine.append(text)
    return Criterion(
        key="width_gaps",
        title="gaps between widths (interpolation)",
        verdict="fail" if refine else "pass",
        measured=f"{len(refine)} interval(s) to refine; worst {worst[0]:.2f} x tolerance",
        threshold=(
            f"fail: mid-interval error of linear interpolation in w > {GAP_SIGMA:g} "
            "sigma_mid + noise(n_mid)"
        ),
        details=refine[:20],
        data={"intervals": rows},
    )


# --------------------------------------------------------------------------------------------
# 3. resolving power and 4. round trip
# --------------------------------------------------------------------------------------------
def resolving_criterion(res: list[ResolvingPower]) -> Criterion:
    lines, rows = [], []
    verdict = "pass"
    for r in res:
        lines.append(
            f"T = {r.temperature_K:g} K, {r.pressures_Pa.size} pressures "
            f"{r.pressures_Pa[0]:.3g}-{r.pressures_Pa[-1]:.3g} Pa: {r.summary()}; "
            f"{r.n_significant} singular value(s) >= 1"
        )
        for q in (0, r.widths_w_nm.size // 2, r.widths_w_nm.size - 1):
            lines.append(
                f"T = {r.temperature_K:g} K, w = {r.widths_w_nm[q]:.3g} nm: single-pore "
                f"step dw_1 = {r.single_step_nm[q]:.3g} nm, two-pore half-separation "
                f"dw_2 = {r.pair_half_separation_nm[q]:.3g} nm"
            )
        if r.none_resolved:
            verdict = "warn"
        rows.append(
            {
                "T_K": r.temperature_K,
                "pressures_Pa": r.pressures_Pa,
                "limit_w_nm": r.limit_w_nm,
                "limit_H_nm": r.limit_H_nm,
                "all_resolved": r.all_resolved,
                "none_resolved": r.none_resolved,
                "w_nm": r.widths_w_nm,
                "H_nm": r.widths_H_nm,
                "single_step_nm": r.single_step_nm,
                "single_step_fixed_volume_nm": r.single_step_fixed_volume_nm,
                "pair_half_separation_nm": r.pair_half_separation_nm,
                "kernel_noise_share": r.kernel_noise_share,
                "singular_values": r.singular_values,
                "n_significant": r.n_significant,
            }
        )
    r0 = res[0] if res else None
    thr = (
        "-"
        if r0 is None
        else (
            f"resolved where dw_2 <= {r0.resolution_fraction:g} w (a pair of pores at "
            f"w(1 -+ {r0.resolution_fraction:g}) told from one pore at Delta-chi2 = "
            f"{r0.chi2_threshold:g}, volumes free); noise {r0.noise.describe()}; warn if no width "
            "is resolved"
        )
    )
    return Criterion(
        key="resolving_power",
        title="resolving power",
        verdict=verdict if res else "info",
        measured=lines[0] if lines else "fewer than 3 accessible widths",
        threshold=thr,
        details=lines[1:],
        data={"temperatures": rows},
    )


def default_psds(res: ResolvingPower) -> tuple[SyntheticPSD, ...]:
    """The default synthetic PSDs, placed on the kernel's width range [lo, hi] and its resolved
    range [lo, top] (top = the resolved limit, or hi when everything or nothing is resolved),
    r = top - lo, h the inversion grid step; every mode at least as broad as
    max(2 h, dw_2 at its centre):
    * "one mode": a Gaussian in the middle of the resolved range, standard deviation >= 0.12 r;
    * "two modes": the first at lo + 0.2 r, the second 3 (s1 + s2) above it (a clear dip),
      standard deviations >= 0.06 r (when that does not fit into the resolved range, the
      second mode lies above it and the PSD is reported as not resolvable);
    * an invented sample ("Larchmere LSL-7 carbon", invented): 55 % of its volume in a narrow
      mode near the narrow end, 45 % in a broad mode across the upper half of the whole range.
    """
    w = res.widths_w_nm
    lo, hi = float(w[0]), float(w[-1])
    span = hi - lo
    top = float(res.limit_w_nm) if np.isfinite(res.limit_w_nm) else hi
    r = max(top - lo, 0.1 * span)
    g = inversion_grid(res)
    h = float(g[1] - g[0])

    pairs = np.asarray(res.pair_half_separation_nm, dtype=float)

    def sd(c: float, base: float) -> float:
        pair = res.pair_at(min(max(c, lo), hi))
        if not np.isfinite(pair):
            # between a resolved and an unresolved width dw_2 interpolates to infinity: take
            # the largest finite dw_2 at or below c (the mode is then as broad as resolvable)
            ok = np.isfinite(pairs) & (w <= c)
            pair = float(pairs[ok].max()) if ok.any() else 0.0
        return max(base, MIN_MODE_STEPS * h, pair)

    c1 = lo + 0.2 * r
    s1 = sd(c1, 0.06 * r)

    def gap(c: float) -> float:  # zero where c = c1 + 3 (s1 + s2(c))
        return c1 + 3.0 * (s1 + sd(c, 0.06 * r)) - c

    if gap(lo + r) > 0.0:  # no room in the resolved range: place it anyway (not resolvable)
        c2 = min(c1 + 3.0 * (s1 + sd(c1, 0.06 * r)), hi)
    else:
        a, b = c1, lo + r
        for _ in range(50):
            mid = 0.5 * (a + b)
            a, b = (mid, b) if gap(mid) > 0.0 else (a, mid)
        c2 = b
    c0 = lo + 0.5 * r
    return (
        SyntheticPSD("one mode", ((c0, sd(c0, 0.12 * r), 1.0),)),
        SyntheticPSD("two modes", ((c1, s1, 0.5), (c2, sd(c2, 0.06 * r), 0.5))),
        SyntheticPSD(
            "Larchmere LSL-7 carbon (invented)",
            (
                (lo + 0.12 * span, max(0.04 * span, MIN_MODE_STEPS * h), 0.55),
                (lo + 0.6 * span, 0.12 * span, 0.45),
            ),
        ),
    )


def psd_peaks(w: np.ndarray, f: np.ndarray) -> np.ndarray:
    """Positions of the local maxima of f above MODE_PEAK_FRACTION of its maximum, refined by
    a parabola through the three points around each.

    Parameters
    ----------
    w : numpy.ndarray
        The width grid (nm), increasing.
    f : numpy.ndarray
        The PSD on that grid.

    Returns
    -------
    numpy.ndarray
        The peak positions (nm), increasing.
    """
    if f.size < 3 or np.max(f) <= 0:
        return np.array([])
    level = MODE_PEAK_FRACTION * float(np.max(f))
    fp = np.concatenate([[-np.inf], f, [-np.inf]])
    out = []
    for i in range(f.size):
        if f[i] >= level and f[i] > fp[i] and f[i] >= fp[i + 2]:
            if 0 < i < f.size - 1:
                y0, y1, y2 = f[i - 1], f[i], f[i + 1]
                den = y0 - 2 * y1 + y2
                shift = 0.5 * (y0 - y2) / den if den != 0 else 0.0
                shift = min(max(shift, -0.5), 0.5)
                out.append(w[i] + shift * (w[i + 1] - w[i - 1]) / 2)
            else:
                out.append(w[i])
    return np.array(out)


def match_modes(true: list[float], found: np.ndarray, window: list[float]) -> list[float]:
    """The found peak assigned to each true mode, greedy by distance, a peak farther than the
    mode's window counting as none (NaN: missed).

    Parameters
    ----------
    true : list of float
        The true mode centres (nm).
    found : numpy.ndarray
        The recovered peak positions (nm).
    window : list of float
        Per true mode, the largest distance (nm) at which a peak still counts for it.

    Returns
    -------
    list of float
        Per true mode, the matched peak position, NaN where none matched.
    """
    out = [float("nan")] * len(true)
    free = list(range(found.size))
    pairs = sorted(
        (abs(found[q] - c), i, q)
        for i, c in enumerate(true)
        for q in free
        if abs(found[q] - c) <= window[i]
    )
    used_t, used_f = set(), set()
    for _, i, q in pairs:
        if i in used_t or q in used_f:
            continue
        out[i] = float(found[q])
        used_t.add(i)
        used_f.add(q)
    return out


def uniform_grid(widths_nm: np.ndarray) -> np.ndarray:
    """The uniform inversion grid over a set of widths: its step is the smallest spacing
    between distinct widths, with 20 to 60 points.

    Parameters
    ----------
    widths_nm : numpy.ndarray
        The widths (nm); repeated values count once.

    Returns
    -------
    numpy.ndarray
        The grid (nm), from the smallest to the largest width.

    Raises
    ------
    InputError
        Fewer than two distinct finite widths (no step can be defined: a single width or
        repeated equal widths would give an infinite or undefined point count).
    """
    w = np.unique(np.asarray(widths_nm, dtype=float))
    w = w[np.isfinite(w)]
    if w.size >= 2:
        steps = np.diff(w)
        steps = steps[steps > 1e-9 * max(float(w[-1] - w[0]), 1e-300)]
    else:
        steps = np.zeros(0)
    if steps.size == 0:
        raise InputError("width grid: need at least 2 distinct widths for an inversion grid")
    count = int(np.clip(round((w[-1] - w[0]) / float(np.min(steps))) + 1, 20, 60))
    return np.linspace(float(w[0]), float(w[-1]), count)


def inversion_grid(res: ResolvingPower) -> np.ndarray:
    """The uniform inversion grid of a resolving power's widths (:func:`uniform_grid`)."""
    return uniform_grid(res.widths_w_nm)


def round_trip(
    kernel: Kernel, res: ResolvingPower, psd: SyntheticPSD, settings: CheckSettings, stream: int = 0
) -> RoundTrip:
    """One synthetic PSD through the kernel and back (see the module docstring)."""
    with single_threaded_blas():
        return _round_trip(kernel, res, psd, settings, stream)


def _round_trip(
    kernel: Kernel, res: ResolvingPower, psd: SyntheticPSD, settings: CheckSettings, stream: int
) -> RoundTrip:
    temp = res.temperature_K
    p = res.pressures_Pa
    grid = inversion_grid(res)
    fine = np.linspace(grid[0], grid[-1], 4 * (grid.size - 1) + 1)
    k_fine = kernel.evaluate(p, fine, temp) * MMOL_PER_CM3_PER_NM3
    k_grid = kernel.evaluate(p, grid, temp) * MMOL_PER_CM3_PER_NM3
    vol = settings.pore_volume_cm3_g
    shape_fine = psd.shape(fine)
    norm = float(np.sum(shape_fine * trapezoid_weights(fine)))
    if norm <= 0:
        raise InputError(f"synthetic PSD {psd.name!r}: no volume inside the kernel's range")
    f_fine = vol * shape_fine / norm
    f_grid = vol * psd.shape(grid) / norm
    b_true = k_fine @ (f_fine * trapezoid_weights(fine))
    sigma = np.sqrt(
        (settings.noise.relative * b_true) ** 2 + (settings.noise.absolute_mmol_cm3 * vol) ** 2
    )
    # resolvable?
    reasons = []
    centres = psd.centres
    for c in centres:
        if c < grid[0] or c > grid[-1]:
            reasons.append(f"mode at {c:.3g} nm outside the kernel range")
        elif not res.is_resolved(c):
            reasons.append(
                f"mode at {c:.3g} nm above the resolved limit"
                + ("" if res.none_resolved else f" {res.limit_w_nm:.3g} nm")
            )
    modes = sorted(psd.modes)
    step = float(grid[1] - grid[0])
    for c, sd, _ in modes:
        need = max(MIN_MODE_STEPS * step, res.pair_at(min(max(c, grid[0]), grid[-1])))
        if sd < need:
            reasons.append(
                f"mode at {c:.3g} nm narrower (sd {sd:.3g} nm) than "
                f"max({MIN_MODE_STEPS:g} grid steps, dw_2) = {need:.3g} nm"
            )
    for (c0, s0, _), (c1, s1, _) in zip(modes[:-1], modes[1:], strict=True):
        need = max(2.0 * res.pair_at(0.5 * (c0 + c1)), ROUND_TRIP_SEPARATION * (s0 + s1))
        if c1 - c0 < need:
            reasons.append(
                f"modes at {c0:.3g} and {c1:.3g} nm closer than max(2 dw_2, "
                f"{ROUND_TRIP_SEPARATION:g} (sd1 + sd2)) = {need:.3g} nm"
            )
    true_peaks = psd_peaks(fine, f_fine)
    if true_peaks.size < len(psd.modes):
        reasons.append("the true PSD has fewer maxima than modes")
    resolvable = not reasons
    rng = np.random.default_rng([settings.seed, stream])
    recs, vols, modes, lams = [], [], [], []
    tols = [ROUND_TRIP_MODE_PAIRS * res.pair_at(c) + float(grid[1] - grid[0]) for c in centres]
    windows = [ROUND_TRIP_MATCH_WINDOW * tol for tol in tols]
    for _ in range(settings.realisations):
        b = b_true + sigma * rng.standard_normal(b_true.size)
        inv = invert(k_grid, grid, b, sigma, method=settings.inversion_method)
        recs.append(inv.psd)
        vols.append(float(np.sum(inv.psd * trapezoid_weights(grid))))
        modes.append(match_modes(centres, psd_peaks(grid, inv.psd), windows))
        lams.append(inv.lam)
    recs = np.array(recs)
    rt = RoundTrip(
        temperature_K=temp,
        psd=psd,
        resolvable=resolvable,
        why="; ".join(reasons) if reasons else "all modes in the resolved range",
        widths_nm=grid,
        true_psd=f_grid,
        recovered=recs,
        volume_true=vol,
        volume_recovered=np.array(vols),
        modes_true=centres,
        modes_recovered=modes,
        mode_tolerances=tols,
        lambdas=np.array(lams),
        verdict="info",
        failures=[],
    )
    if resolvable:
        fails = []
        mean_v, _ = rt.volume_rel_error
        if abs(mean_v) > ROUND_TRIP_VOLUME_TOL:  # median
            fails.append(f"pore volume off by {100 * mean_v:+.1f} %")
        for (err, _sd, found), c, tol in zip(rt.mode_errors(), centres, tols, strict=True):
            if found <= ROUND_TRIP_FOUND_FRACTION * settings.realisations:
                fails.append(
                    f"mode at {c:.3g} nm missed in {settings.realisations - found} of "
                    f"{settings.realisations} realisations"
                )
            elif abs(err) > tol:
                fails.append(
                    f"mode at {c:.3g} nm recovered {err:+.3g} nm off (tolerance {tol:.3g} nm)"
                )
        rt.failures = fails
        rt.verdict = "fail" if fails else "pass"
    return rt


def round_trip_criterion(trips: list[RoundTrip], settings: CheckSettings) -> Criterion:
    lines, rows = [], []
    for rt in trips:
        mv, sv = rt.volume_rel_error
        modes = ", ".join(
            f"{c:.3g} -> "
            + (f"{c + e:.3g} +- {sd:.2g}" if n else "missed")
            + (f" ({n}/{settings.realisations})" if n < settings.realisations else "")
            for c, (e, sd, n) in zip(rt.modes_true, rt.mode_errors(), strict=True)
        )
        state = rt.verdict if rt.resolvable else "not resolvable"
        lines.append(
            f"T = {rt.temperature_K:g} K, {rt.psd.name}: {state}; volume "
            f"{100 * mv:+.1f} +- {100 * sv:.1f} %; modes (nm) {modes}"
            + (f"; {rt.why}" if not rt.resolvable else "")
            + (f"; FAILED: {'; '.join(rt.failures)}" if rt.failures else "")
        )
        rows.append(
            {
                "T_K": rt.temperature_K,
                "psd": rt.psd.name,
                "modes": rt.psd.modes,
                "resolvable": rt.resolvable,
                "why": rt.why,
                "verdict": rt.verdict,
                "volume_rel_error_mean": mv,
                "volume_rel_error_sd": sv,
                "mode_errors_nm": rt.mode_errors(),
                "mode_tolerances_nm": rt.mode_tolerances,
                "failures": rt.failures,
                "lambda_median": float(np.median(rt.lambdas)),
            }
        )
    verdict = _worst([rt.verdict for rt in trips if rt.resolvable]) if trips else "info"
    if not any(rt.resolvable for rt in trips):
        verdict = "info"
    n_res = sum(rt.resolvable for rt in trips)
    return Criterion(
        key="round_trip",
        title="round trip synthetic PSD -> isotherm -> PSD",
        verdict=verdict,
        measured=f"{n_res} of {len(trips)} PSD(s) resolvable, "
        f"{sum(rt.verdict == 'fail' for rt in trips)} failed",
        threshold=(
            f"resolvable PSDs: |volume error| <= {100 * ROUND_TRIP_VOLUME_TOL:g} %, each "
            f"mode found in > {100 * ROUND_TRIP_FOUND_FRACTION:g} % of the realisations, "
            f"median error <= {ROUND_TRIP_MODE_PAIRS:g} dw_2 + one "
            f"grid step; {settings.realisations} noise realisations, reference inversion "
            f"({settings.inversion_method}, NNLS + second-difference Tikhonov); others "
            "reported as not resolvable"
        ),
        details=lines,
        data={"psds": rows},
    )


# --------------------------------------------------------------------------------------------
# all checks
# --------------------------------------------------------------------------------------------
def run_checks(kernel: Kernel | KernelData, settings: CheckSettings | None = None) -> CheckReport:
    """Run every check on a kernel (a gcmc.reader.Kernel or a KernelData in memory)."""
    kernel = as_kernel(kernel)
    settings = settings or CheckSettings()
    settings.validate()
    with single_threaded_blas():
        return _run_checks(kernel, settings)


def _run_checks(kernel: Kernel, settings: CheckSettings) -> CheckReport:
    ts = _temperature_indices(kernel, settings.temperatures_K)
    crit = [
        check_point_errors(kernel, settings, ts),
        check_flags(kernel, ts),
        check_monotonic(kernel, ts),
        check_fits(kernel, ts),
        check_hysteresis(kernel, ts),
        check_henry(kernel, ts),
        check_accessibility(kernel, ts),
        check_wide_pore(kernel, ts),
        check_width_outliers(kernel, ts),
        check_width_gaps(kernel, settings, ts),
    ]
    res, trips = [], []
    for t in ts:
        temp = float(kernel.data.temperatures_K[t])
        if np.count_nonzero(kernel.data.accessible[t]) < 3:
            continue
        p = check_pressures(kernel, temp, settings.pressures_Pa, "--pressures-Pa/--p-range")
        r = resolving_power(
            kernel, temp, p, settings.noise, settings.chi2_threshold, settings.resolution_fraction
        )
        res.append(r)
        psds = settings.psds if settings.psds is not None else default_psds(r)
        for i, psd in enumerate(psds):
            trips.append(round_trip(kernel, r, psd, settings, stream=1000 * t + i))
    rp = resolving_criterion(res)
    gaps = next(c for c in crit if c.key == "width_gaps")
    if gaps.verdict == "fail" and res:
        rp.verdict = "warn" if rp.verdict == "pass" else rp.verdict
        rp.details.insert(
            0,
            "the width grid is too coarse for interpolation in places (see "
            "width_gaps): the finite-difference derivatives behind dw_1 and "
            "dw_2 are uncertain there",
        )
    crit.append(rp)
    crit.append(round_trip_criterion(trips, settings))
    return CheckReport(
        kernel_name=kernel.name,
        kernel_version=kernel.version,
        path=_label(kernel),
        settings=settings,
        criteria=crit,
        resolving=res,
        round_trips=trips,
    )


def format_table(report: CheckReport, details: int = 6) -> str:
    """The terminal table: one row per criterion, then the detail lines."""
    head = ("criterion", "verdict", "measured", "threshold")
    rows = [(c.title, c.verdict.upper(), c.measured, c.threshold) for c in report.criteria]
    w0 = max(len(head[0]), *(len(r[0]) for r in rows))
    out = [f"gcmc check: {report.path} ({report.kernel_name} v{report.kernel_version})", ""]
    out.append(f"{head[0]:<{w0}}  {head[1]:<7}  {head[2]}")
    out.append("-" * (w0 + 2 + 7 + 2 + 40))
    for c, r in zip(report.criteria, rows, strict=True):
        out.append(f"{r[0]:<{w0}}  {r[1]:<7}  {r[2]}")
        out.append(f"{'':<{w0}}  {'':<7}  threshold: {r[3]}")
        for line in c.details[:details]:
            out.append(f"{'':<{w0}}  {'':<7}    - {line}")
        if len(c.details) > details:
            out.append(f"{'':<{w0}}  {'':<7}    ... {len(c.details) - details} more (--json)")
    counts = {v: sum(c.verdict == v for c in report.criteria) for v in ("fail", "warn")}
    out.append("")
    out.append(f"verdict: {report.verdict.upper()} ({counts['fail']} fail, {counts['warn']} warn)")
    return "\n".join(out)


__all__ = [
    "CheckReport",
    "CheckSettings",
    "Criterion",
    "RoundTrip",
    "SyntheticPSD",
    "check_accessibility",
    "check_fits",
    "check_flags",
    "check_henry",
    "check_hysteresis",
    "check_monotonic",
    "check_point_errors",
    "check_wide_pore",
    "check_width_gaps",
    "check_width_outliers",
    "default_psds",
    "uniform_grid",
    "format_table",
    "inversion_grid",
    "match_modes",
    "psd_peaks",
    "round_trip",
    "run_checks",
    "runs_test",
]
