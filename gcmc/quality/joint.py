"""Checking a set of kernels (several probes or temperatures, one pore structure) as one joint
inversion would use them (``gcmc check K1 K2 ...``).

A *member* of the set is one kernel at one temperature with its own experiment (pressures and
noise model). All members describe the same sample: one pore-size distribution f(w) gives the
amount of every member, b_m(p_i) = sum_j K_m(p_i, w_j) f_j dw_j. The checks, in the order of
the report:

1. ``set_consistency``: a joint inversion is meaningful only when every member means the same
   thing by a width and a pore volume. A set that mixes solid models (the solid's name, density,
   interlayer spacing, epsilon_ss and sigma_ss; the solid-fluid scaling is a property of the
   probe-solid pair and may differ), width conventions or pore-volume conventions, or whose
   width axes do not overlap, is refused with a one-line reason (:class:`InputError`).
2. ``set_accessibility``: the smallest accessible width per member (probe and temperature):
   which probe speaks for which pores (molecular sieving).
3. ``set_resolving_power``: the definitions of :mod:`gcmc.quality.resolution`, with the
   noise-weighted vectors of all members stacked. The single pore (width w', volume V) that is
   to mimic a pair of pores is one and the same for every member, so the projector P2 acts on
   the stacked vectors u = [K_m/sigma_m], g' = [K'_m/sigma_m], g'' = [K''_m/sigma_m]
   (:func:`gcmc.quality.resolution.resolution_from_matrix` on the row-stacked matrices), and
   ||P2 g''||^2 adds the evidence of every member. Members are evaluated on one width grid,
   the set grid: the widths of all members inside the overlap of their width axes, from the
   smallest accessible width of any member up. A member contributes nothing (zero rows) at
   widths below its own smallest accessible width; its derivatives are taken over its own
   accessible widths only (one-sided at its accessibility edge), as for a single kernel.
   Duplicate members (the same kernel contents, temperature, pressures and noise) are counted
   once: a second copy of the same isotherm is not new evidence about the sample (stacking it
   would shrink dw_2 by 2^(1/4) for nothing). Reported per width: dw_2 of the set and of each
   member, the resolved width intervals (dw_2 <= rho w) of the set and of each member, the
   widths that only the set resolves, and the gain min_m dw_2,m / dw_2,set. Singular values of
   the stacked matrix [K_m / sigma_ref,m] (sigma_ref,m: the noise of member m's reference
   sample, as for one kernel). Warns when the set resolves no width.
4. ``set_round_trip``: synthetic PSDs on the set grid -> isotherms of every member (on a width
   grid four times finer than the inversion grid) with each member's noise -> the reference
   inversion (:func:`gcmc.quality.inversion.invert`) of the stacked rows -> recovered volume
   and modes, repeated for several noise realisations; each member alone is inverted from the
   same noisy isotherm for comparison. Resolvability, mode matching and the pass/fail rules
   are those of the single round trip (:mod:`gcmc.quality.criteria`) with dw_2 of the set;
   a member alone is judged by the same rules and tolerances ("recovered" or not, reported).
5. ``member_health``: every member's own point, fit and width-grid checks (the single check
   without its round trip), one line per member; the worst member verdict.

Planning (:func:`plan`): for widths a user wants resolved, the gain each candidate member
(another kernel, or a cheap screening build of another gas or temperature) brings to a base
set: targets resolved before and after, and the geometric mean over the targets of
dw_2,before / dw_2,after. Without a base set the available members are ranked by greedy forward
selection (first the best single member, then the one that adds most to it, ...).
"""

from __future__ import annotations

import hashlib
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from gcmc.errors import InputError
from gcmc.kernel.data import KernelData
from gcmc.kernel.reader import Kernel
from gcmc.physics.units import MMOL_PER_CM3_PER_NM3
from gcmc.quality.criteria import (
    JUDGING_FIELDS,
    MIN_MODE_STEPS,
    ROUND_TRIP_FOUND_FRACTION,
    ROUND_TRIP_MATCH_WINDOW,
    ROUND_TRIP_MODE_PAIRS,
    ROUND_TRIP_SEPARATION,
    ROUND_TRIP_VOLUME_TOL,
    CheckSettings,
    Criterion,
    SyntheticPSD,
    as_kernel,
    jsonable,
    match_modes,
    psd_peaks,
    run_checks,
    uniform_grid,
)
from gcmc.quality.inversion import METHODS, invert, single_threaded_blas, trapezoid_weights
from gcmc.quality.resolution import (
    DEFAULT_CHI2_THRESHOLD,
    DEFAULT_RESOLUTION_FRACTION,
    NoiseModel,
    check_pressures,
    curvature,
    extrapolate_ends,
    kernel_relative_errors,
    resolution_from_matrix,
)

_RANK = {"pass": 0, "info": 0, "warn": 1, "fail": 2}
#: Solid keys that must agree across a set (the solid-fluid scaling may differ per probe).
SOLID_KEYS = ("name", "density_nm3", "interlayer_nm", "epsilon_k", "sigma_nm")
#: Relative tolerance for equal numbers (solid parameters) and equal widths.
SAME_RTOL = 1e-9
#: Widths closer than this (nm) count as one width of the set grid.
WIDTH_MERGE_NM = 1e-6


# --------------------------------------------------------------------------------------------
# members
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Experiment:
    """One member's experiment: its pressures (None: the kernel's own) and noise model."""

    pressures_Pa: np.ndarray | None = None
    noise: NoiseModel = field(default_factory=NoiseModel)


@dataclass
class Member:
    """One kernel at one temperature with its experiment. ``pressures_Pa`` is filled (checked
    against the kernel) by :func:`make_member`."""

    label: str
    kernel: Kernel
    temperature_K: float
    experiment: Experiment
    pressures_Pa: np.ndarray
    fingerprint: str

    @property
    def noise(self) -> NoiseModel:
        """The member's experimental noise model."""
        return self.experiment.noise

    def accessible_widths(self) -> np.ndarray:
        """The member's accessible kernel widths (w axis, nm)."""
        d = self.kernel.data
        t = self.kernel.temperature_index(self.temperature_K)
        return np.asarray(d.widths_w_nm, float)[np.asarray(d.accessible[t], bool)]

    @property
    def smallest_accessible_w_nm(self) -> float:
        """The member's smallest accessible kernel width (w, nm); NaN if none."""
        w = self.accessible_widths()
        return float(w[0]) if w.size else float("nan")


def kernel_fingerprint(kernel: Kernel) -> str:
    """A digest of what a kernel predicts: probe, temperatures, widths, pressures, the stored
    fits and the dense table (not its name or version). Two kernels with the same digest
    predict the same isotherms."""
    d = kernel.data
    h = hashlib.sha256()
    h.update(repr(sorted(d.probe.items())).encode())
    for a in (d.temperatures_K, d.widths_w_nm, d.widths_H_nm, d.pressures_Pa):
        h.update(np.ascontiguousarray(np.asarray(a, float)).tobytes())
    h.update(np.ascontiguousarray(np.asarray(d.dense_density_per_nm3, float)).tobytes())
    for row in d.fits:
        for rec in row:
            h.update(rec.form.encode())
            h.update(np.ascontiguousarray(np.asarray(rec.parameters, float)).tobytes())
    return h.hexdigest()


def kernel_label(kernel: Kernel) -> str:
    """The kernel's file name, or its name when it is in memory."""
    path = getattr(kernel, "path", None)
    return path.name if path is not None else str(kernel.name)


def make_member(
    kernel: Kernel | KernelData,
    temperature_K: float | None = None,
    experiment: Experiment | None = None,
    label: str | None = None,
) -> Member:
    """A member of a set: ``kernel`` at ``temperature_K`` (default: its only temperature) with
    ``experiment`` (default: the kernel's own pressures and the default noise model).

    Raises
    ------
    InputError
        The temperature is not one of the kernel's, the kernel has several temperatures and
        none is given, or the experiment's pressures are unusable (see
        :func:`gcmc.quality.resolution.check_pressures`).
    """
    kernel = as_kernel(kernel)
    experiment = experiment or Experiment()
    temps = np.asarray(kernel.data.temperatures_K, float)
    if temperature_K is None:
        if temps.size != 1:
            known = ", ".join(f"{x:g}" for x in temps)
            raise InputError(
                f"{kernel_label(kernel)}: has several temperatures ({known} K); name one"
            )
        temperature_K = float(temps[0])
    t = kernel.temperature_index(float(temperature_K))
    temp = float(temps[t])
    label = label or kernel_label(kernel) + (f" @ {temp:g} K" if temps.size > 1 else "")
    p = check_pressures(kernel, temp, experiment.pressures_Pa, f"{label}: pressures")
    h = hashlib.sha256(kernel_fingerprint(kernel).encode())
    h.update(f"\0{temp!r}\0{experiment.noise.relative!r}\0".encode())
    h.update(f"{experiment.noise.absolute_mmol_cm3!r}\0".encode())
    h.update(np.ascontiguousarray(p).tobytes())
    return Member(label, kernel, temp, experiment, p, h.hexdigest())


def members_of(
    kernels: list[Kernel | KernelData],
    temperatures_K: tuple[float, ...] | None = None,
    experiment: Experiment | None = None,
) -> list[Member]:
    """One member per kernel and temperature (every kernel temperature, or those of
    ``temperatures_K`` that the kernel has), all with the same experiment."""
    out = []
    for k in kernels:
        k = as_kernel(k)
        temps = np.asarray(k.data.temperatures_K, float)
        chosen = [float(x) for x in temps]
        if temperatures_K is not None:
            chosen = [
                float(x)
                for x in temps
                if any(abs(x - y) <= SAME_RTOL * abs(x) for y in temperatures_K)
            ]
            if not chosen:
                want = ", ".join(f"{x:g}" for x in temperatures_K)
                raise InputError(f"{kernel_label(k)}: has no temperature among {want} K")
        for temp in chosen:
            lab = kernel_label(k) + (f" @ {temp:g} K" if temps.size > 1 else "")
            out.append(make_member(k, temp, experiment, lab))
    return out


def unique_members(members: list[Member]) -> tuple[list[Member], list[tuple[str, str]]]:
    """The members with duplicates removed (same kernel contents, temperature, pressures and
    noise: the first is kept) and the (duplicate, kept) label pairs."""
    seen: dict[str, Member] = {}
    dups = []
    for m in members:
        if m.fingerprint in seen:
            dups.append((m.label, seen[m.fingerprint].label))
        else:
            seen[m.fingerprint] = m
    return list(seen.values()), dups


# --------------------------------------------------------------------------------------------
# 1. consistency
# --------------------------------------------------------------------------------------------
def _same_number(a: Any, b: Any) -> bool:
    try:
        x, y = float(a), float(b)
    except (TypeError, ValueError):
        return a == b
    return abs(x - y) <= SAME_RTOL * max(abs(x), abs(y), 1e-300)


def set_consistency(members: list[Member]) -> Criterion:
    """The consistency of a set (module docstring, item 1): a ``pass`` criterion listing what
    the members share.

    Raises
    ------
    InputError
        With a one-line reason naming the two members that disagree: different solid models,
        width conventions or pore-volume conventions, width axes that do not overlap, or fewer
        than 3 widths in the overlap.
    """
    if not members:
        raise InputError("kernel set: no kernels given")
    first = members[0]
    d0 = first.kernel.data
    for m in members[1:]:
        d = m.kernel.data
        for key in SOLID_KEYS:
            a, b = d0.solid.get(key), d.solid.get(key)
            if not _same_number(a, b):
                raise InputError(
                    f"kernel set: mixed solid models: {first.label} has solid {key} = {a!r}, "
                    f"{m.label} has {b!r}"
                )
        if d.width_convention != d0.width_convention:
            raise InputError(
                f"kernel set: mixed width conventions: {first.label} uses "
                f"{d0.width_convention!r}, {m.label} uses {d.width_convention!r}"
            )
        if d.pore_volume_convention != d0.pore_volume_convention:
            raise InputError(
                f"kernel set: mixed pore-volume conventions: {first.label} uses "
                f"{d0.pore_volume_convention!r}, {m.label} uses {d.pore_volume_convention!r}"
            )
    lo = max(float(np.min(m.kernel.data.widths_w_nm)) for m in members)
    hi = min(float(np.max(m.kernel.data.widths_w_nm)) for m in members)
    if not lo < hi:
        a = max(members, key=lambda m: float(np.min(m.kernel.data.widths_w_nm)))
        b = min(members, key=lambda m: float(np.max(m.kernel.data.widths_w_nm)))
        raise InputError(
            f"kernel set: width axes do not overlap: {a.label} starts at w = "
            f"{np.min(a.kernel.data.widths_w_nm):.4g} nm, {b.label} ends at w = "
            f"{np.max(b.kernel.data.widths_w_nm):.4g} nm"
        )
    grid = set_grid(members)
    return Criterion(
        key="set_consistency",
        title="one solid, one width and pore-volume convention",
        verdict="pass",
        measured=(
            f"{len(members)} member(s); solid {d0.solid.get('name')!r}; widths "
            f"{d0.width_convention!r}; pore volume {d0.pore_volume_convention!r}; set grid "
            f"w = {grid[0]:.4g}-{grid[-1]:.4g} nm ({grid.size} widths)"
        ),
        threshold="refused (bad input): mixed solid models (" + ", ".join(SOLID_KEYS) + "), "
        "width or pore-volume conventions, or width axes that do not overlap",
        details=[
            f"{m.label}: probe {m.kernel.data.probe.get('name', '?')!r}, T = "
            f"{m.temperature_K:g} K, w = {np.min(m.kernel.data.widths_w_nm):.4g}-"
            f"{np.max(m.kernel.data.widths_w_nm):.4g} nm, {m.pressures_Pa.size} pressures"
            for m in members
        ],
        data={
            "solid": {k: d0.solid.get(k) for k in SOLID_KEYS},
            "width_convention": d0.width_convention,
            "pore_volume_convention": d0.pore_volume_convention,
            "set_grid_w_nm": grid,
        },
    )


def set_grid(members: list[Member]) -> np.ndarray:
    """The set's width grid (module docstring, item 3): the members' widths inside the overlap
    of their width axes, from the smallest accessible width of any member up; widths closer
    than WIDTH_MERGE_NM merged.

    Raises
    ------
    InputError
        Fewer than 3 widths (no second derivative, no resolving power).
    """
    lo = max(float(np.min(m.kernel.data.widths_w_nm)) for m in members)
    hi = min(float(np.max(m.kernel.data.widths_w_nm)) for m in members)
    acc = [m.smallest_accessible_w_nm for m in members]
    acc = [a for a in acc if np.isfinite(a)]
    if not acc:
        raise InputError("kernel set: no member has an accessible width")
    lo = max(lo, min(acc))
    allw = np.sort(np.concatenate([np.asarray(m.kernel.data.widths_w_nm, float) for m in members]))
    tol = WIDTH_MERGE_NM
    allw = allw[(allw >= lo - tol) & (allw <= hi + tol)]
    grid: list[float] = []
    for x in allw:
        if not grid or x - grid[-1] > tol:
            grid.append(float(x))
    if len(grid) < 3:
        raise InputError(
            f"kernel set: fewer than 3 widths in the overlap of the width axes "
            f"(w = {lo:.4g}-{hi:.4g} nm) above the smallest accessible width"
        )
    return np.array(grid)


# --------------------------------------------------------------------------------------------
# 2. accessibility
# --------------------------------------------------------------------------------------------
def set_accessibility(members: list[Member]) -> Criterion:
    """The smallest accessible width per member (info): which probe speaks for which pores."""
    rows, lines = [], []
    for m in sorted(members, key=lambda x: x.smallest_accessible_w_nm):
        d = m.kernel.data
        w = m.smallest_accessible_w_nm
        j = int(np.argmin(np.abs(np.asarray(d.widths_w_nm, float) - w)))
        h = float(d.widths_H_nm[j])
        rows.append(
            {
                "member": m.label,
                "probe": d.probe.get("name", "?"),
                "T_K": m.temperature_K,
                "smallest_accessible_w_nm": w,
                "smallest_accessible_H_nm": h,
                "sigma_nm": d.probe.get("sigma_nm"),
            }
        )
        lines.append(
            f"{m.label} ({d.probe.get('name', '?')}, T = {m.temperature_K:g} K): pores from "
            f"w = {w:.4g} nm (H = {h:.4g} nm) up"
        )
    spread = max(r["smallest_accessible_w_nm"] for r in rows) - min(
        r["smallest_accessible_w_nm"] for r in rows
    )
    return Criterion(
        key="set_accessibility",
        title="smallest accessible width per probe",
        verdict="info",
        measured=f"from w = {rows[0]['smallest_accessible_w_nm']:.4g} nm "
        f"({rows[0]['member']}); the members' limits span {spread:.3g} nm",
        threshold="reported, not judged: below its limit a probe sees no pore (molecular "
        "sieving); the kernel marks the smallest accessible width",
        details=lines,
        data={"members": rows},
    )


# --------------------------------------------------------------------------------------------
# 3. joint resolving power
# --------------------------------------------------------------------------------------------
@dataclass
class MemberMatrices:
    """One member on the set grid, mmol/cm^3: K, dK/dw, d2K/dw2, the noise sigma, the variance
    of d2K/dw2 from the kernel's own errors, and the accessible columns; (P, W)."""

    k: np.ndarray
    d1: np.ndarray
    d2: np.ndarray
    sigma: np.ndarray
    d2_variance: np.ndarray
    accessible: np.ndarray  # (W,)
    reference_sigma: np.ndarray  # (P,) noise of the reference sample


def member_kernel(member: Member, widths_nm: np.ndarray) -> np.ndarray:
    """Member's kernel matrix (mmol/cm^3, pressures x widths) at arbitrary widths inside its
    axis; zero below its smallest accessible width (the probe does not enter those pores)."""
    w = np.asarray(widths_nm, float)
    k = np.zeros((member.pressures_Pa.size, w.size))
    ok = w >= member.smallest_accessible_w_nm - WIDTH_MERGE_NM
    if np.any(ok):
        k[:, ok] = (
            member.kernel.evaluate(member.pressures_Pa, w[ok], member.temperature_K)
            * MMOL_PER_CM3_PER_NM3
        )
    if not np.all(np.isfinite(k)):
        raise InputError(f"{member.label}: the kernel is not finite on the requested pressures")
    return k


def member_matrices(
    member: Member, grid: np.ndarray, correct_kernel_noise: bool = True
) -> MemberMatrices:
    """The member's matrices on the set grid (module docstring, item 3)."""
    k = member_kernel(member, grid)
    acc = grid >= member.smallest_accessible_w_nm - WIDTH_MERGE_NM
    cols = np.flatnonzero(acc)
    d1 = np.zeros_like(k)
    d2 = np.zeros_like(k)
    var2 = np.zeros_like(k)
    if cols.size >= 3:
        ka, wa = k[:, cols], grid[cols]
        d1[:, cols] = np.gradient(ka, wa, axis=1, edge_order=2)
        sk2 = None
        if correct_kernel_noise:
            d = member.kernel.data
            t = member.kernel.temperature_index(member.temperature_K)
            own = np.flatnonzero(np.asarray(d.accessible[t], bool))
            rel_own = kernel_relative_errors(member.kernel, t, own, member.pressures_Pa)
            w_own = np.asarray(d.widths_w_nm, float)[own]
            rel = np.array([np.interp(wa, w_own, row) for row in rel_own])
            sk2 = (rel * ka) ** 2
        d2a, v = curvature(ka, wa, d1[:, cols], sk2, member.noise.sigma(ka))
        d2[:, cols] = d2a
        if v is not None:
            var2[:, cols] = v
    elif cols.size:
        acc[:] = False  # fewer than 3 accessible set widths: no derivative evidence
    sigma = member.noise.sigma(k)
    sigma = np.where(sigma > 0, sigma, max(member.noise.absolute_mmol_cm3, 1e-300))
    ref = member.noise.sigma(np.mean(k[:, cols], axis=1) if cols.size else np.zeros(k.shape[0]))
    ref = np.where(ref > 0, ref, 1e-300)
    return MemberMatrices(k, d1, d2, sigma, var2, acc, ref)


@dataclass
class Resolution:
    """Resolving power of one group of members on the set grid."""

    labels: list[str]
    widths_w_nm: np.ndarray
    pair_half_separation_nm: np.ndarray  # dw_2
    single_step_nm: np.ndarray  # dw_1
    kernel_noise_share: np.ndarray
    resolved: np.ndarray
    intervals_w_nm: list[tuple[float, float]]
    singular_values: np.ndarray
    n_significant: int
    resolution_fraction: float

    def pair_at(self, w_nm: float) -> float:
        """dw_2 interpolated in ln dw_2 (inf outside the grid or where a neighbour is inf)."""
        w = self.widths_w_nm
        if w_nm < w[0] - WIDTH_MERGE_NM or w_nm > w[-1] + WIDTH_MERGE_NM:
            return float("inf")
        with np.errstate(divide="ignore"):
            return float(np.exp(np.interp(w_nm, w, np.log(self.pair_half_separation_nm))))

    def is_resolved(self, w_nm: float) -> bool:
        """Whether a width lies inside one of the resolved intervals."""
        return any(a - WIDTH_MERGE_NM <= w_nm <= b + WIDTH_MERGE_NM for a, b in self.intervals_w_nm)

    @property
    def resolved_span_nm(self) -> float:
        """Total width of the resolved intervals (nm)."""
        return float(sum(b - a for a, b in self.intervals_w_nm))

    def describe(self) -> str:
        """The resolved width intervals in words."""
        if not self.intervals_w_nm:
            return f"no width resolved (dw_2 > {self.resolution_fraction:g} w everywhere)"
        return "resolved w = " + ", ".join(f"{a:.3g}-{b:.3g}" for a, b in self.intervals_w_nm)


def resolved_intervals(
    w: np.ndarray, pair: np.ndarray, rho: float
) -> tuple[np.ndarray, list[tuple[float, float]]]:
    """The mask dw_2 <= rho w and its runs as width intervals, each end at the crossing
    dw_2 = rho w interpolated in ln(dw_2 / (rho w)) between grid widths (the grid's ends where
    a run reaches them)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.log(pair / (rho * w))
    mask = ratio <= 0.0
    out = []
    j = 0
    n = w.size
    while j < n:
        if not mask[j]:
            j += 1
            continue
        a = j
        while j + 1 < n and mask[j + 1]:
            j += 1
        b = j

        def cross(i0: int, i1: int) -> float:  # i0 resolved, i1 not
            x0, x1 = ratio[i0], ratio[i1]
            frac = x0 / (x0 - x1) if np.isfinite(x1) and x1 != x0 else 0.0
            frac = min(max(frac, 0.0), 1.0)
            return float(w[i0] + frac * (w[i1] - w[i0]))

        lo = float(w[a]) if a == 0 else cross(a, a - 1)
        hi = float(w[b]) if b == n - 1 else cross(b, b + 1)
        out.append((lo, hi))
        j += 1
    return mask, out


def group_resolution(
    mats: list[MemberMatrices],
    labels: list[str],
    grid: np.ndarray,
    chi2_threshold: float = DEFAULT_CHI2_THRESHOLD,
    resolution_fraction: float = DEFAULT_RESOLUTION_FRACTION,
) -> Resolution:
    """Resolving power of the members' stacked matrices on the set grid (module docstring)."""
    k = np.vstack([m.k for m in mats])
    d1 = np.vstack([m.d1 for m in mats])
    d2 = np.vstack([m.d2 for m in mats])
    sigma = np.vstack([m.sigma for m in mats])
    var2 = np.vstack([m.d2_variance for m in mats])
    out = resolution_from_matrix(k, d1, d2, sigma, chi2_threshold, var2)
    pair = np.array(out["pair"], float)
    seen = np.any(np.stack([m.accessible for m in mats]), axis=0)
    pair = extrapolate_ends(grid, pair)
    pair[~seen] = np.inf
    mask, intervals = resolved_intervals(grid, pair, resolution_fraction)
    m_sv = np.vstack([m.k / m.reference_sigma[:, None] for m in mats])
    sv = np.linalg.svd(m_sv, compute_uv=False)
    return Resolution(
        labels=list(labels),
        widths_w_nm=grid,
        pair_half_separation_nm=pair,
        single_step_nm=np.array(out["single"], float),
        kernel_noise_share=np.array(out["noise_share"], float),
        resolved=mask,
        intervals_w_nm=intervals,
        singular_values=sv,
        n_significant=int(np.count_nonzero(sv >= 1.0)),
        resolution_fraction=float(resolution_fraction),
    )


@dataclass
class JointResolution:
    """The set's resolving power and each member's on the same grid."""

    set: Resolution
    members: list[Resolution]
    duplicates: list[tuple[str, str]]
    chi2_threshold: float
    resolution_fraction: float

    @property
    def best_member_pair_nm(self) -> np.ndarray:
        """Per width, the smallest dw_2 of any member alone."""
        return np.min(np.stack([r.pair_half_separation_nm for r in self.members]), axis=0)

    @property
    def gain(self) -> np.ndarray:
        """Per width, min_m dw_2,m / dw_2,set (1: no gain; NaN where the set sees nothing, and
        at the grid's two end widths, where every dw_2 is extrapolated, not measured)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            g = self.best_member_pair_nm / self.set.pair_half_separation_nm
        g = np.where(np.isfinite(self.set.pair_half_separation_nm), g, np.nan)
        if g.size >= 3:
            g[0] = g[-1] = np.nan
        return g

    @property
    def only_set(self) -> np.ndarray:
        """Widths of the grid that the set resolves and no member alone does."""
        any_member = np.any(np.stack([r.resolved for r in self.members]), axis=0)
        return self.set.widths_w_nm[self.set.resolved & ~any_member]


def joint_resolution(
    members: list[Member],
    chi2_threshold: float = DEFAULT_CHI2_THRESHOLD,
    resolution_fraction: float = DEFAULT_RESOLUTION_FRACTION,
    correct_kernel_noise: bool = True,
    grid: np.ndarray | None = None,
) -> JointResolution:
    """Resolving power of the set and of each (unique) member alone on the set grid.

    Parameters
    ----------
    members : list of Member
        The set; duplicates are counted once.
    chi2_threshold, resolution_fraction : float
        Delta-chi2 and rho of :mod:`gcmc.quality.resolution`.
    correct_kernel_noise : bool
        Subtract the kernels' own statistical errors from ||P2 g''||^2 (as for one kernel).
    grid : numpy.ndarray, optional
        The width grid (default :func:`set_grid`).

    Returns
    -------
    JointResolution
    """
    if not (np.isfinite(chi2_threshold) and chi2_threshold > 0.0):
        raise InputError(f"chi2 threshold: must be > 0, got {chi2_threshold}")
    if not (np.isfinite(resolution_fraction) and resolution_fraction > 0.0):
        raise InputError(f"resolution fraction: must be > 0, got {resolution_fraction}")
    uniq, dups = unique_members(members)
    grid = set_grid(uniq) if grid is None else np.asarray(grid, float)
    mats = [member_matrices(m, grid, correct_kernel_noise) for m in uniq]
    with single_threaded_blas():
        whole = group_resolution(
            mats, [m.label for m in uniq], grid, chi2_threshold, resolution_fraction
        )
        alone = [
            group_resolution([x], [m.label], grid, chi2_threshold, resolution_fraction)
            for x, m in zip(mats, uniq, strict=True)
        ]
    return JointResolution(whole, alone, dups, float(chi2_threshold), float(resolution_fraction))


def set_resolving_criterion(jr: JointResolution, noises: list[str]) -> Criterion:
    """The ``set_resolving_power`` criterion (reported; warns when the set resolves nothing)."""
    s = jr.set
    lines = []
    for r in jr.members:
        lines.append(
            f"{r.labels[0]} alone: {r.describe()} (span {r.resolved_span_nm:.3g} nm); "
            f"{r.n_significant} singular value(s) >= 1"
        )
    gained = jr.only_set
    best_span = max((r.resolved_span_nm for r in jr.members), default=0.0)
    if gained.size:
        lines.append(
            "resolved only by the set: w = " + ", ".join(f"{x:.3g}" for x in gained) + " nm"
        )
    g = jr.gain
    fin = np.isfinite(g)
    if np.any(fin):
        j = int(np.nanargmax(np.where(fin, g, np.nan)))
        lines.append(
            f"largest gain at w = {s.widths_w_nm[j]:.3g} nm: dw_2 {jr.best_member_pair_nm[j]:.3g}"
            f" nm (best member) -> {s.pair_half_separation_nm[j]:.3g} nm (set), x{g[j]:.2f}"
        )
    for lab, kept in jr.duplicates:
        lines.append(f"{lab}: the same isotherm as {kept}, counted once")
    rows = {
        "w_nm": s.widths_w_nm,
        "set_pair_half_separation_nm": s.pair_half_separation_nm,
        "set_resolved": s.resolved,
        "set_intervals_w_nm": s.intervals_w_nm,
        "set_resolved_span_nm": s.resolved_span_nm,
        "set_singular_values": s.singular_values,
        "set_n_significant": s.n_significant,
        "gain": g,
        "resolved_only_by_set_w_nm": gained,
        "duplicates": jr.duplicates,
        "members": [
            {
                "member": r.labels[0],
                "pair_half_separation_nm": r.pair_half_separation_nm,
                "resolved": r.resolved,
                "intervals_w_nm": r.intervals_w_nm,
                "resolved_span_nm": r.resolved_span_nm,
                "singular_values": r.singular_values,
                "n_significant": r.n_significant,
            }
            for r in jr.members
        ],
    }
    return Criterion(
        key="set_resolving_power",
        title="joint resolving power",
        verdict="warn" if not s.intervals_w_nm else "pass",
        measured=(
            f"set: {s.describe()} (span {s.resolved_span_nm:.3g} nm against "
            f"{best_span:.3g} nm for the best member alone); {s.n_significant} singular "
            "value(s) >= 1"
        ),
        threshold=(
            f"resolved where dw_2 <= {jr.resolution_fraction:g} w (a pair of pores at "
            f"w(1 -+ {jr.resolution_fraction:g}) told from one pore, the same for every "
            f"member, at Delta-chi2 = {jr.chi2_threshold:g}, volumes free); noise "
            + "; ".join(noises)
            + "; warn if the set resolves no width"
        ),
        details=lines,
        data=rows,
    )


# --------------------------------------------------------------------------------------------
# 4. joint round trip
# --------------------------------------------------------------------------------------------
def default_set_psds(jr: JointResolution) -> tuple[SyntheticPSD, ...]:
    """Default synthetic PSDs for a set, placed on its resolved range [lo, top] (the lowest
    start and highest end of the set's resolved intervals; the grid when nothing is resolved),
    r = top - lo, h the inversion grid step, every mode at least as broad as
    max(2 h, dw_2 of the set at its centre):
    * "two modes, narrow and wide": modes at lo + 0.15 r and top - 0.2 r, standard deviations
      >= 0.05 r: the case that needs the members together (a small probe for the narrow mode,
      a larger one for the wide mode);
    * "one mode": in the middle of the widest resolved interval, standard deviation >= 0.12
      times its length;
    * an invented sample ("Tarnbrook TC-3 char", invented): 60 % of its volume in a narrow
      mode near the narrow end of the set grid, 40 % in a broad mode across its upper half.
    """
    s = jr.set
    w = s.widths_w_nm
    g = uniform_grid(w)
    h = float(g[1] - g[0])
    span = float(w[-1] - w[0])
    if s.intervals_w_nm:
        lo = s.intervals_w_nm[0][0]
        top = s.intervals_w_nm[-1][1]
        widest = max(s.intervals_w_nm, key=lambda ab: ab[1] - ab[0])
    else:
        lo, top = float(w[0]), float(w[-1])
        widest = (lo, top)
    r = max(top - lo, 0.1 * span)

    def sd(c: float, base: float) -> float:
        p = s.pair_at(min(max(c, float(w[0])), float(w[-1])))
        return max(base, MIN_MODE_STEPS * h, p if np.isfinite(p) else 0.0)

    c1, c2 = lo + 0.15 * r, top - 0.2 * r
    c0 = 0.5 * (widest[0] + widest[1])
    ln = max(widest[1] - widest[0], 0.1 * span)
    return (
        SyntheticPSD(
            "two modes, narrow and wide", ((c1, sd(c1, 0.05 * r), 0.5), (c2, sd(c2, 0.05 * r), 0.5))
        ),
        SyntheticPSD("one mode", ((c0, sd(c0, 0.12 * ln), 1.0),)),
        SyntheticPSD(
            "Tarnbrook TC-3 char (invented)",
            (
                (float(w[0]) + 0.1 * span, max(0.04 * span, MIN_MODE_STEPS * h), 0.6),
                (float(w[0]) + 0.65 * span, 0.12 * span, 0.4),
            ),
        ),
    )


@dataclass
class Recovery:
    """Recovered PSDs of one inversion setup (the set, or one member alone) over the noise
    realisations, judged by the set's rules."""

    label: str
    recovered: np.ndarray  # (realisations, widths)
    volume_recovered: np.ndarray
    modes_recovered: list[list[float]]
    verdict: str  # "pass" / "fail" (set); "recovered" / "not recovered" (members)
    failures: list[str]

    def volume_rel_error(self, volume_true: float) -> tuple[float, float]:
        """Median relative volume error and half the 16-84 % range."""
        e = self.volume_recovered / volume_true - 1.0
        lo, hi = np.percentile(e, [16, 84])
        return float(np.median(e)), float(0.5 * (hi - lo))

    def mode_errors(self, true: list[float]) -> list[tuple[float, float, int]]:
        """Per true mode: (median error, half the 16-84 % range, realisations found)."""
        out = []
        for i, c in enumerate(true):
            found = np.array([m[i] for m in self.modes_recovered if np.isfinite(m[i])])
            if found.size == 0:
                out.append((float("nan"), float("nan"), 0))
            else:
                lo, hi = np.percentile(found, [16, 84])
                out.append((float(np.median(found) - c), float(0.5 * (hi - lo)), int(found.size)))
        return out

    def band(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Median and 16 / 84 % quantiles over the realisations."""
        q = np.percentile(self.recovered, [16, 50, 84], axis=0)
        return q[1], q[0], q[2]


@dataclass
class JointRoundTrip:
    """A synthetic round trip of the set: one PSD through the stacked kernels and back by the
    joint inversion, beside each member's own recovery."""

    psd: SyntheticPSD
    resolvable: bool
    why: str
    widths_nm: np.ndarray
    true_psd: np.ndarray
    volume_true: float
    modes_true: list[float]
    mode_tolerances: list[float]
    joint: Recovery
    members: list[Recovery]

    @property
    def verdict(self) -> str:
        """The verdict: the joint recovery's, or info where the PSD is not resolvable."""
        return self.joint.verdict if self.resolvable else "info"


def _judge(rec: Recovery, true: list[float], tols: list[float], vol: float, n: int) -> list[str]:
    fails = []
    mv, _ = rec.volume_rel_error(vol)
    if abs(mv) > ROUND_TRIP_VOLUME_TOL:
        fails.append(f"pore volume off by {100 * mv:+.1f} %")
    for (err, _sd, found), c, tol in zip(rec.mode_errors(true), true, tols, strict=True):
        if found <= ROUND_TRIP_FOUND_FRACTION * n:
            fails.append(f"mode at {c:.3g} nm missed in {n - found} of {n} realisations")
        elif abs(err) > tol:
            fails.append(f"mode at {c:.3g} nm recovered {err:+.3g} nm off (tolerance {tol:.3g} nm)")
    return fails


def joint_round_trip(
    members: list[Member],
    jr: JointResolution,
    psd: SyntheticPSD,
    realisations: int = 12,
    seed: int = 2026,
    pore_volume_cm3_g: float = 0.5,
    method: str = "gcv",
    stream: int = 0,
) -> JointRoundTrip:
    """One synthetic PSD through every member and back, jointly and member by member (module
    docstring, item 4)."""
    if realisations < 2:
        raise InputError(f"realisations: need at least 2, got {realisations}")
    if method not in METHODS:
        raise InputError(f"inversion: must be one of {', '.join(METHODS)}, got {method!r}")
    uniq, _ = unique_members(members)
    res = jr.set
    grid = uniform_grid(res.widths_w_nm)
    fine = np.linspace(grid[0], grid[-1], 4 * (grid.size - 1) + 1)
    vol = float(pore_volume_cm3_g)
    shape_fine = psd.shape(fine)
    norm = float(np.sum(shape_fine * trapezoid_weights(fine)))
    if norm <= 0:
        raise InputError(f"synthetic PSD {psd.name!r}: no volume inside the set's width range")
    f_fine = vol * shape_fine / norm
    f_grid = vol * psd.shape(grid) / norm
    k_grid = [member_kernel(m, grid) for m in uniq]
    b_true, sig = [], []
    for m in uniq:
        b = member_kernel(m, fine) @ (f_fine * trapezoid_weights(fine))
        b_true.append(b)
        s = np.sqrt((m.noise.relative * b) ** 2 + (m.noise.absolute_mmol_cm3 * vol) ** 2)
        sig.append(np.where(s > 0, s, 1e-300))
    # resolvable? (the single round trip's rules with the set's dw_2)
    reasons = []
    centres = psd.centres
    step = float(grid[1] - grid[0])
    for c in centres:
        if c < grid[0] or c > grid[-1]:
            reasons.append(f"mode at {c:.3g} nm outside the set's width range")
        elif not res.is_resolved(c):
            reasons.append(f"mode at {c:.3g} nm outside the set's resolved widths")
    modes = sorted(psd.modes)
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
    if psd_peaks(fine, f_fine).size < len(psd.modes):
        reasons.append("the true PSD has fewer maxima than modes")
    resolvable = not reasons
    tols = []
    for c in centres:
        p = res.pair_at(c)
        tols.append(
            ROUND_TRIP_MODE_PAIRS * (p if np.isfinite(p) else float(grid[-1] - grid[0])) + step
        )
    windows = [ROUND_TRIP_MATCH_WINDOW * t for t in tols]
    rng = np.random.default_rng([seed, stream])
    setups = [("set", list(range(len(uniq))))] + [(m.label, [i]) for i, m in enumerate(uniq)]
    acc = {lab: ([], [], []) for lab, _ in setups}
    with single_threaded_blas():
        for _ in range(realisations):
            noisy = [b + s * rng.standard_normal(b.size) for b, s in zip(b_true, sig, strict=True)]
            for lab, idx in setups:
                inv = invert(
                    np.vstack([k_grid[i] for i in idx]),
                    grid,
                    np.concatenate([noisy[i] for i in idx]),
                    np.concatenate([sig[i] for i in idx]),
                    method=method,
                )
                recs, vols, found = acc[lab]
                recs.append(inv.psd)
                vols.append(float(np.sum(inv.psd * trapezoid_weights(grid))))
                found.append(match_modes(centres, psd_peaks(grid, inv.psd), windows))
    out = {}
    for lab, _ in setups:
        recs, vols, found = acc[lab]
        rec = Recovery(lab, np.array(recs), np.array(vols), found, "", [])
        rec.failures = _judge(rec, centres, tols, vol, realisations)
        if lab == "set":
            rec.verdict = ("fail" if rec.failures else "pass") if resolvable else "info"
        else:
            rec.verdict = "not recovered" if rec.failures else "recovered"
        out[lab] = rec
    return JointRoundTrip(
        psd=psd,
        resolvable=resolvable,
        why="; ".join(reasons) if reasons else "all modes in the set's resolved widths",
        widths_nm=grid,
        true_psd=f_grid,
        volume_true=vol,
        modes_true=centres,
        mode_tolerances=tols,
        joint=out["set"],
        members=[out[m.label] for m in uniq],
    )


def _modes_text(rec: Recovery, rt: JointRoundTrip, n: int) -> str:
    return ", ".join(
        f"{c:.3g} -> " + (f"{c + e:.3g}" if k else "missed") + (f" ({k}/{n})" if k < n else "")
        for c, (e, _sd, k) in zip(rt.modes_true, rec.mode_errors(rt.modes_true), strict=True)
    )


def set_round_trip_criterion(
    trips: list[JointRoundTrip], realisations: int, method: str
) -> Criterion:
    """The ``set_round_trip`` criterion: judged on the PSDs the set resolves."""
    lines, rows = [], []
    for rt in trips:
        mv, sv = rt.joint.volume_rel_error(rt.volume_true)
        state = rt.verdict if rt.resolvable else "not resolvable"
        lines.append(
            f"{rt.psd.name}: set {state}; volume {100 * mv:+.1f} +- {100 * sv:.1f} %; modes (nm) "
            f"{_modes_text(rt.joint, rt, realisations)}"
            + (f"; {rt.why}" if not rt.resolvable else "")
            + (f"; FAILED: {'; '.join(rt.joint.failures)}" if rt.joint.failures else "")
        )
        for rec in rt.members:
            mvm, _ = rec.volume_rel_error(rt.volume_true)
            lines.append(
                f"{rt.psd.name}: {rec.label} alone {rec.verdict}; volume {100 * mvm:+.1f} %; "
                f"modes {_modes_text(rec, rt, realisations)}"
            )
        rows.append(
            {
                "psd": rt.psd.name,
                "modes": rt.psd.modes,
                "resolvable": rt.resolvable,
                "why": rt.why,
                "verdict": rt.verdict,
                "mode_tolerances_nm": rt.mode_tolerances,
                "set": {
                    "volume_rel_error_median": mv,
                    "volume_rel_error_sd": sv,
                    "mode_errors_nm": rt.joint.mode_errors(rt.modes_true),
                    "failures": rt.joint.failures,
                },
                "members": [
                    {
                        "member": rec.label,
                        "verdict": rec.verdict,
                        "volume_rel_error_median": rec.volume_rel_error(rt.volume_true)[0],
                        "mode_errors_nm": rec.mode_errors(rt.modes_true),
                        "failures": rec.failures,
                    }
                    for rec in rt.members
                ],
            }
        )
    judged = [rt for rt in trips if rt.resolvable]
    verdict = max((rt.verdict for rt in judged), key=lambda v: _RANK[v]) if judged else "info"
    gains = sum(
        rt.resolvable and rt.verdict == "pass" and all(r.verdict != "recovered" for r in rt.members)
        for rt in trips
    )
    return Criterion(
        key="set_round_trip",
        title="joint round trip synthetic PSD -> isotherms -> PSD",
        verdict=verdict,
        measured=f"{len(judged)} of {len(trips)} PSD(s) resolvable by the set, "
        f"{sum(rt.verdict == 'fail' for rt in trips)} failed; {gains} recovered by the set "
        "and by no member alone",
        threshold=(
            f"resolvable PSDs: |volume error| <= {100 * ROUND_TRIP_VOLUME_TOL:g} %, each mode "
            f"found in > {100 * ROUND_TRIP_FOUND_FRACTION:g} % of the realisations, median error "
            f"<= {ROUND_TRIP_MODE_PAIRS:g} dw_2(set) + one grid step; {realisations} noise "
            f"realisations, reference inversion ({method}, NNLS + second-difference Tikhonov) of "
            "the stacked isotherms; each member alone judged by the same rules"
        ),
        details=lines,
        data={"psds": rows},
    )


# --------------------------------------------------------------------------------------------
# 5. member health, and the whole set check
# --------------------------------------------------------------------------------------------
@dataclass
class SetSettings:
    """Options of :func:`run_set_checks` (the CLI's, with the same defaults)."""

    target_rel_stderr: float = 0.02
    chi2_threshold: float = DEFAULT_CHI2_THRESHOLD
    resolution_fraction: float = DEFAULT_RESOLUTION_FRACTION
    realisations: int = 12
    seed: int = 2026
    pore_volume_cm3_g: float = 0.5
    inversion_method: str = "gcv"
    psds: tuple[SyntheticPSD, ...] | None = None  # None: default_set_psds()
    member_health: bool = True

    def check_settings(self) -> CheckSettings:
        """The single check's settings these share (the measurement's left at defaults)."""
        return CheckSettings(
            target_rel_stderr=self.target_rel_stderr,
            **{name: getattr(self, name) for name in JUDGING_FIELDS},
        )

    def validate(self) -> None:
        """Raise InputError naming the first setting out of range."""
        self.check_settings().validate()


def member_health(members: list[Member], settings: SetSettings) -> Criterion:
    """Each member's single check without its round trip; the worst verdict."""
    lines, rows, verdicts = [], [], []
    for m in members:
        rep = run_checks(
            m.kernel,
            CheckSettings(
                target_rel_stderr=settings.target_rel_stderr,
                noise=m.noise,
                pressures_Pa=m.experiment.pressures_Pa,
                temperatures_K=(m.temperature_K,),
                chi2_threshold=settings.chi2_threshold,
                resolution_fraction=settings.resolution_fraction,
                psds=(),
            ),
        )
        bad = [c for c in rep.criteria if c.verdict in ("warn", "fail")]
        verdicts.append(rep.verdict)
        lines.append(
            f"{m.label}: {rep.verdict}"
            + (": " + ", ".join(f"{c.key} {c.verdict}" for c in bad) if bad else "")
        )
        rows.append(
            {
                "member": m.label,
                "verdict": rep.verdict,
                "criteria": [asdict(c) for c in rep.criteria],
            }
        )
    worst = max(verdicts, key=lambda v: _RANK[v]) if verdicts else "info"
    return Criterion(
        key="member_health",
        title="each member's own checks",
        verdict=worst,
        measured=f"{sum(v == 'fail' for v in verdicts)} fail, {sum(v == 'warn' for v in verdicts)} "
        f"warn of {len(verdicts)} member(s)",
        threshold="the single check's criteria and thresholds (gcmc check KERNEL), round trip "
        "excepted; the worst member decides",
        details=lines,
        data={"members": rows},
    )


@dataclass
class SetReport:
    """The result of checking a set of kernels: members, criteria, joint resolution, round trips."""

    members: list[Member]
    settings: SetSettings
    criteria: list[Criterion]
    resolution: JointResolution
    round_trips: list[JointRoundTrip]

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
        """The report as JSON-ready dict."""
        return jsonable(
            {
                "members": [
                    {
                        "label": m.label,
                        "kernel": {
                            "name": m.kernel.name,
                            "version": m.kernel.version,
                            "path": None if m.kernel.path is None else str(m.kernel.path),
                        },
                        "temperature_K": m.temperature_K,
                        "pressures_Pa": m.pressures_Pa,
                        "noise": {
                            "relative": m.noise.relative,
                            "absolute_mmol_cm3": m.noise.absolute_mmol_cm3,
                            "model": m.noise.describe(),
                        },
                    }
                    for m in self.members
                ],
                "verdict": self.verdict,
                "settings": self.settings.check_settings().to_dict(measurement=False),
                "criteria": [asdict(c) for c in self.criteria],
            }
        )


def run_set_checks(members: list[Member], settings: SetSettings | None = None) -> SetReport:
    """Check a set of members as one joint inversion would use them (module docstring).

    Raises
    ------
    InputError
        The set is inconsistent (:func:`set_consistency`) or an option is out of range.
    """
    settings = settings or SetSettings()
    settings.validate()
    consistency = set_consistency(members)
    uniq, _ = unique_members(members)
    with single_threaded_blas():
        jr = joint_resolution(uniq, settings.chi2_threshold, settings.resolution_fraction)
        jr.duplicates = unique_members(members)[1]
        noises = sorted({f"{m.label}: {m.noise.describe()}" for m in uniq})
        crit = [consistency, set_accessibility(uniq), set_resolving_criterion(jr, noises)]
        psds = settings.psds if settings.psds is not None else default_set_psds(jr)
        trips = [
            joint_round_trip(
                uniq,
                jr,
                psd,
                settings.realisations,
                settings.seed,
                settings.pore_volume_cm3_g,
                settings.inversion_method,
                stream=i,
            )
            for i, psd in enumerate(psds)
        ]
        crit.append(
            set_round_trip_criterion(trips, settings.realisations, settings.inversion_method)
        )
        if settings.member_health:
            crit.append(member_health(uniq, settings))
    return SetReport(members, settings, crit, jr, trips)


def format_set_table(report: SetReport, details: int = 8) -> str:
    """The terminal table of a set check: one row per criterion, then the detail lines."""
    labels = ", ".join(m.label for m in report.members)
    out = [f"gcmc check (set of {len(report.members)}): {labels}", ""]
    w0 = max(len("criterion"), *(len(c.title) for c in report.criteria))
    out.append(f"{'criterion':<{w0}}  {'verdict':<7}  measured")
    out.append("-" * (w0 + 2 + 7 + 2 + 40))
    for c in report.criteria:
        out.append(f"{c.title:<{w0}}  {c.verdict.upper():<7}  {c.measured}")
        out.append(f"{'':<{w0}}  {'':<7}  threshold: {c.threshold}")
        for line in c.details[:details]:
            out.append(f"{'':<{w0}}  {'':<7}    - {line}")
        if len(c.details) > details:
            out.append(f"{'':<{w0}}  {'':<7}    ... {len(c.details) - details} more (--json)")
    counts = {v: sum(c.verdict == v for c in report.criteria) for v in ("fail", "warn")}
    out.append("")
    out.append(f"verdict: {report.verdict.upper()} ({counts['fail']} fail, {counts['warn']} warn)")
    return "\n".join(out)


# --------------------------------------------------------------------------------------------
# planning
# --------------------------------------------------------------------------------------------
@dataclass
class PlanRow:
    """One row of the width plan: a member ranked by the target widths it adds."""

    rank: int
    member: str
    added_to: list[str]
    targets_resolved_before: int
    targets_resolved_after: int
    pair_before_nm: list[float]
    pair_after_nm: list[float]
    gain: float  # geometric mean over the targets of dw_2 before / after (inf before: counted
    # as the after value's ratio to the grid span)


@dataclass
class Plan:
    """The width plan: members ranked by the resolution they add at the target widths."""

    targets_w_nm: list[float]
    base: list[str]
    rows: list[PlanRow]
    resolution_fraction: float

    def to_dict(self) -> dict[str, Any]:
        """The plan as JSON-ready dict."""
        return jsonable(
            {
                "targets_w_nm": self.targets_w_nm,
                "base": self.base,
                "resolution_fraction": self.resolution_fraction,
                "ranking": [asdict(r) for r in self.rows],
            }
        )


def _pairs_at(members: list[Member], targets: list[float], chi2: float, rho: float) -> np.ndarray:
    if not members:
        return np.full(len(targets), np.inf)
    set_consistency(members)
    r = joint_resolution(members, chi2, rho).set
    return np.array([r.pair_at(x) for x in targets])


def _score(pairs: np.ndarray, targets: np.ndarray, rho: float) -> int:
    return int(np.count_nonzero(pairs <= rho * targets))


def _gain(before: np.ndarray, after: np.ndarray, targets: np.ndarray) -> float:
    """Geometric mean of dw_2 before / after over the targets; an unseen target (inf before)
    counts as before = the target width itself (a pair at w(1 -+ 1) is the weakest claim)."""
    b = np.where(np.isfinite(before), before, targets)
    a = np.where(np.isfinite(after), after, np.maximum(b, targets))
    return float(np.exp(np.mean(np.log(b / a))))


def plan(
    targets_w_nm: list[float],
    candidates: list[Member],
    base: list[Member] | None = None,
    chi2_threshold: float = DEFAULT_CHI2_THRESHOLD,
    resolution_fraction: float = DEFAULT_RESOLUTION_FRACTION,
) -> Plan:
    """Rank candidates by the resolution they add at the target widths (module docstring).

    Parameters
    ----------
    targets_w_nm : list of float
        Widths (w axis, nm) the user wants resolved.
    candidates : list of Member
        Kernels (or screening builds) that could be added.
    base : list of Member, optional
        The set already measured. Empty or None: the candidates are ranked by greedy forward
        selection.

    Returns
    -------
    Plan
        Rows ordered best first: targets resolved after adding (more first), then the gain.

    Raises
    ------
    InputError
        No target or candidate, a target that is not a positive number, or a candidate that
        is inconsistent with the base set.
    """
    t = np.asarray(targets_w_nm, float)
    if t.size == 0 or not np.all(np.isfinite(t) & (t > 0)):
        raise InputError("--plan-widths: need one or more widths > 0 nm")
    if not candidates:
        raise InputError("plan: no candidate kernels")
    rho = resolution_fraction
    base = list(base or [])
    rows: list[PlanRow] = []
    if base:
        before = _pairs_at(base, list(t), chi2_threshold, rho)
        scored = []
        for c in candidates:
            after = _pairs_at(base + [c], list(t), chi2_threshold, rho)
            scored.append((c, after))
        scored.sort(key=lambda ca: (-_score(ca[1], t, rho), -_gain(before, ca[1], t)))
        for i, (c, after) in enumerate(scored, 1):
            rows.append(
                PlanRow(
                    i,
                    c.label,
                    [m.label for m in base],
                    _score(before, t, rho),
                    _score(after, t, rho),
                    list(before),
                    list(after),
                    _gain(before, after, t),
                )
            )
    else:
        chosen: list[Member] = []
        left = list(candidates)
        before = np.full(t.size, np.inf)
        while left:
            best = None
            for c in left:
                after = _pairs_at(chosen + [c], list(t), chi2_threshold, rho)
                key = (_score(after, t, rho), _gain(before, after, t))
                if best is None or key > best[0]:
                    best = (key, c, after)
            _, c, after = best
            rows.append(
                PlanRow(
                    len(rows) + 1,
                    c.label,
                    [m.label for m in chosen],
                    _score(before, t, rho),
                    _score(after, t, rho),
                    list(before),
                    list(after),
                    _gain(before, after, t),
                )
            )
            chosen.append(c)
            left.remove(c)
            before = after
    return Plan([float(x) for x in t], [m.label for m in base], rows, float(rho))


def _num(x: float) -> str:
    return f"{x:.3g}" if np.isfinite(x) else "-"


def format_plan(p: Plan) -> str:
    """The ranked planning table."""
    targets = ", ".join(f"{x:g}" for x in p.targets_w_nm)
    head = (
        f"plan: target widths w = {targets} nm (resolved: dw_2 <= {p.resolution_fraction:g} w)"
        + (f"; base set: {', '.join(p.base)}" if p.base else "; greedy order from nothing")
    )
    out = [head, ""]
    w0 = max(len("member"), *(len(r.member) for r in p.rows))
    out.append(
        f"{'rank':>4}  {'member':<{w0}}  {'targets resolved':>16}  {'gain':>6}  "
        "dw_2 at targets, before -> after (nm)"
    )
    for r in p.rows:
        pairs = ", ".join(
            f"{_num(a)} -> {_num(b)}"
            for a, b in zip(r.pair_before_nm, r.pair_after_nm, strict=True)
        )
        out.append(
            f"{r.rank:>4}  {r.member:<{w0}}  "
            f"{f'{r.targets_resolved_before} -> {r.targets_resolved_after}':>16}  "
            f"{r.gain:>6.2f}  {pairs}"
        )
    return "\n".join(out)


__all__ = [
    "Experiment",
    "JointResolution",
    "JointRoundTrip",
    "Member",
    "Plan",
    "PlanRow",
    "Recovery",
    "Resolution",
    "SetReport",
    "SetSettings",
    "default_set_psds",
    "format_plan",
    "format_set_table",
    "group_resolution",
    "joint_resolution",
    "joint_round_trip",
    "kernel_fingerprint",
    "make_member",
    "member_health",
    "member_kernel",
    "member_matrices",
    "members_of",
    "plan",
    "resolved_intervals",
    "run_set_checks",
    "set_accessibility",
    "set_consistency",
    "set_grid",
    "set_resolving_criterion",
    "set_round_trip_criterion",
    "unique_members",
]
