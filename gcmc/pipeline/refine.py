"""Refinement rounds: from a finished kernel and its quality target to the next round's tasks.

:func:`plan_round` is a pure function of the config (its target) and the finished results
(the kernel assembled from the task files, and the layout that says which files those are):
the same files always give the same round, so a build killed mid-round and resumed replays
the same rounds and ends with the same kernel, bit for bit.

What a round acts on, with the quality check's own formulas (:mod:`gcmc.quality.criteria`),
at every temperature and accessible width:

* **width gaps**: the mid-interval error of linear interpolation in width, estimated as the
  check does (the cubic through the four nearest widths against the chord), judged against
  3 sigma_mid + ``width_tolerance`` x the experiment's noise. An interval above it is split
  into m = ceil(sqrt(ratio)) parts (linear interpolation errs as h^2; at most 4 per round),
  placed with density ~ sqrt|P''| of that cubic at the worst pressure (equal error per part),
  never closer than ``min_spacing_nm``; an interval that cannot be split any more is recorded
  as unresolvable (a layering transition, typically).
* **points**: unconverged or flagged points, points above the error target (the effort grows
  as (error / target)^2), the lowest point of an isotherm off the exact Henry law, and
  outliers between widths (the check's rule, warn level) are rerun at the next escalation step
  (:mod:`gcmc.pipeline.escalation`). A dense subcritical point (:func:`dense_point`: below
  the probe's critical temperature and filled, by its current density) has one step more
  after the others: the certificate of a filled point ("certified tempering"), with what the
  point's earlier reruns left of the per-point budget as its CPU budget (given up when its
  first attempt would not fit); any other point's steps, and so a supercritical build's
  rounds, are those of :data:`gcmc.pipeline.escalation.STEPS` only. An outlier that
  resampling confirmed (its rerun still an outlier) is structure, not noise: the intervals on
  both sides get new widths instead.
* **budget**: tasks are taken in priority order (unconverged points, Henry, error target,
  outliers, then intervals by their error) while the CPU seconds spent plus the estimated cost
  (measured cost of neighbouring tasks; for a certified step its whole CPU budget) fit the
  budget; the rest is reported as cut by it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from gcmc.kernel.data import KernelData
from gcmc.physics.units import MMOL_PER_CM3_PER_NM3
from gcmc.pipeline.assemble import Layout
from gcmc.pipeline.escalation import first_step_with_effort, is_dense_point, last_step, step
from gcmc.pipeline.tasks import BRANCHES, Task, added_width_task
from gcmc.quality.criteria import (
    OUTLIER_WARN,
    _branch_arrays,
    _lagrange,
    _neighbours,
    check_henry,
    width_interval_errors,
)
from gcmc.quality.resolution import NoiseModel
from gcmc.quality.target import QualityTarget

#: new widths are rounded to this (nm)
SNAP_NM = 1e-4
#: at most this many parts per interval and round
MAX_SPLIT = 4
#: effort margin over (error / target)^2 for points above the error target
EFFORT_MARGIN = 1.3

#: an outlier at this many pressures of one width is structure in width (e.g. molecular
#: layering), not a bad point: new widths beside it rather than reruns
STRUCTURE_POINTS = 3

PRIORITY = {"unconverged": 0, "henry": 1, "flagged": 2, "error": 3, "outlier": 4}


@dataclass
class Finding:
    """Something the target is not met by, and what the round does about it."""

    kind: str  # "gap", "unconverged", "flagged", "error", "henry", "outlier"
    where: str
    detail: str
    action: str  # "widths", "rerun", "unresolvable", "given_up"
    ratio: float = 0.0
    structure: bool = False  # an outlier at several pressures of one width: structure

    def line(self) -> str:
        return f"{self.kind} at {self.where}: {self.detail} -> {self.action}"

    def open_line(self, why: str) -> str:
        """The line for a finding left open because the rounds stopped (``why``)."""
        action = f"not acted on ({why})" if self.action in ("rerun", "widths") else self.action
        return f"{self.kind} at {self.where}: {self.detail} -> {action}"


@dataclass
class RoundPlan:
    """The tasks of a round (priority order, already cut to the budget) and why."""

    widths: list[tuple[float, str]] = field(default_factory=list)  # (H, reason)
    reruns: list[tuple[Task, tuple[int, int, int, int], str]] = field(default_factory=list)
    findings: list[Finding] = field(default_factory=list)
    cut_by_budget: list[str] = field(default_factory=list)
    estimated_cpu_seconds: float = 0.0

    @property
    def empty(self) -> bool:
        return not self.widths and not self.reruns

    @property
    def open_findings(self) -> list[Finding]:
        """Findings the round does not act on (unresolvable, given up, or cut by budget)."""
        return [f for f in self.findings if f.action in ("unresolvable", "given_up", "budget")]


def _where(data: KernelData, t: int, j: int, b: int = 0, k: int | None = None) -> str:
    s = f"T = {data.temperatures_K[t]:g} K, H = {data.widths_H_nm[j]:.4g} nm"
    if b:
        s += f", {BRANCHES[b]}"
    if k is not None:
        s += f", p = {data.pressures_Pa[t, k]:.4g} Pa"
    return s


def _snap(h: float) -> float:
    return round(round(h / SNAP_NM) * SNAP_NM, 10)


def place_widths(
    w_nodes: np.ndarray, n_nodes: np.ndarray, h0: float, h1: float, parts: int, offset: float
) -> list[float]:
    """``parts - 1`` new H between h0 and h1, with density ~ sqrt|P''| of the polynomial P
    through (w_nodes, n_nodes) (w = H - offset), so that each part has about the same
    linear-interpolation error; snapped to SNAP_NM."""
    x = np.linspace(h0, h1, 201)
    vals = np.array([float(_lagrange(w_nodes, n_nodes[:, None], xi - offset)[0]) for xi in x])
    d2 = np.abs(np.gradient(np.gradient(vals, x), x))
    dens = np.sqrt(d2) + 0.25 * float(np.mean(np.sqrt(d2)) + 1e-300)
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (dens[1:] + dens[:-1]) * np.diff(x))])
    cum /= cum[-1]
    out = [_snap(float(np.interp(q / parts, cum, x))) for q in range(1, parts)]
    return out


def gap_findings(
    data: KernelData, target: QualityTarget, ts: list[int]
) -> list[tuple[Finding, list[float], tuple[int, int]]]:
    """Width intervals whose mid-interval interpolation error exceeds the target, each with
    the new widths that refine it (empty: unresolvable at the minimum spacing) and the
    indices of its two widths."""
    n, _, _ = _branch_arrays(data, "adsorption")
    noise = NoiseModel(target.noise_rel, target.noise_abs_mmol_cm3)
    w_all = np.asarray(data.widths_w_nm, float)
    h_all = np.asarray(data.widths_H_nm, float)
    offset = float(h_all[0] - w_all[0])
    out = []
    for iv in width_interval_errors(data, ts, noise, target.width_tolerance):
        t, j, j1, k, r, nodes = iv.t, iv.j, iv.j1, iv.worst, iv.ratio, iv.nodes
        if nodes.size < 3 or r <= 1.0:
            continue
        h0, h1 = float(h_all[j]), float(h_all[j1])
        where = f"T = {data.temperatures_K[t]:g} K, H in [{h0:.4g}, {h1:.4g}] nm"
        detail = f"interpolation error {r:.2f} x tolerance at p = {data.pressures_Pa[t, k]:.4g} Pa"
        room = int(math.floor((h1 - h0) / target.min_spacing_nm + 1e-9))
        if room < 2:
            out.append(
                (
                    Finding(
                        "gap",
                        where,
                        detail + f"; spacing {h1 - h0:.4g} nm is at the minimum "
                        f"{target.min_spacing_nm:g} nm",
                        "unresolvable",
                        r,
                    ),
                    [],
                    (j, j1),
                )
            )
            continue
        parts = min(max(2, math.ceil(math.sqrt(r))), MAX_SPLIT, room)
        new = place_widths(w_all[nodes], n[t, nodes][:, k], h0, h1, parts, offset)
        new = _spaced(new, h0, h1, target.min_spacing_nm, parts)
        out.append((Finding("gap", where, detail, "widths", r), new, (j, j1)))
    return out


def _spaced(new: list[float], h0: float, h1: float, spacing: float, parts: int) -> list[float]:
    """New widths at least ``spacing`` from each other and the ends (equal parts otherwise)."""
    pts = [h0, *sorted(new), h1]
    if all(b - a >= spacing - 1e-9 for a, b in zip(pts[:-1], pts[1:], strict=True)):
        return sorted(new)
    return [_snap(h0 + (h1 - h0) * q / parts) for q in range(1, parts)]


def point_findings(
    data: KernelData, layout: Layout, target: QualityTarget, ts: list[int]
) -> list[tuple[Finding, tuple[int, int, int, int], int]]:
    """Points to rerun: (finding, (t, j, branch, k), wanted step)."""
    out: list[tuple[Finding, tuple[int, int, int, int], int]] = []
    seen: set[tuple[int, int, int, int]] = set()
    floor = target.noise_abs_mmol_cm3 / MMOL_PER_CM3_PER_NM3

    def current(key: tuple[int, int, int, int]) -> int:
        o = layout.overrides.get(key)
        return o.step if o is not None else 0

    def add(kind: str, key: tuple[int, int, int, int], detail: str, wanted: int) -> None:
        if key in seen:
            return
        seen.add(key)
        t, j, b, k = key
        out.append((Finding(kind, _where(data, t, j, b, k), detail, "rerun"), key, wanted))

    # unconverged, then flagged (every branch)
    for kind in ("unconverged", "flagged"):
        for bi, branch in enumerate(BRANCHES):
            if branch not in data.points:
                continue
            pts = data.points[branch]
            n = np.asarray(pts["density_per_nm3"], float)
            conv = np.asarray(pts["converged"], float)
            flags = data.flags[branch]
            for t in ts:
                for j in np.flatnonzero(data.accessible[t]):
                    for k in np.flatnonzero(np.isfinite(n[t, j])):
                        items = [
                            f for f in str(flags[t, j, k]).split("; ") if f and f != "inaccessible"
                        ]
                        key = (t, int(j), bi, int(k))
                        if kind == "unconverged" and conv[t, j, k] == 0:
                            add(kind, key, "; ".join(items) or "not converged", current(key) + 1)
                        elif kind == "flagged" and items:
                            add(kind, key, "; ".join(items), current(key) + 1)
    # the lowest points against the exact Henry law (the check's criterion itself)
    from gcmc.kernel.reader import Kernel

    henry = check_henry(Kernel(data), ts)
    w_all = np.asarray(data.widths_w_nm, float)
    for row in henry.data.get("widths", []):
        if row["ratio_to_tolerance"] <= 1.0:
            continue
        t = int(np.argmin(np.abs(np.asarray(data.temperatures_K) - row["T_K"])))
        j = int(np.argmin(np.abs(w_all - row["w_nm"])))
        k = int(np.argmin(np.abs(np.asarray(data.pressures_Pa[t]) - row["p_Pa"])))
        key = (t, j, 0, k)
        add(
            "henry",
            key,
            f"{row['deviation_sigma']:+.1f} sigma from the exact Henry law "
            f"({row['ratio_to_tolerance']:.2f} x tolerance)",
            current(key) + 1,
        )
    # point errors against the target (adsorption, as the check)
    pts = data.points["adsorption"]
    n = np.asarray(pts["density_per_nm3"], float)
    s = np.asarray(pts["density_per_nm3_stderr"], float)
    for t in ts:
        for j in np.flatnonzero(data.accessible[t]):
            for k in np.flatnonzero(np.isfinite(n[t, j]) & np.isfinite(s[t, j])):
                rel = s[t, j, k] / max(n[t, j, k], floor)
                if rel <= target.target_rel_stderr:
                    continue
                key = (t, int(j), 0, int(k))
                cur = current(key)
                need = step(cur).effort * EFFORT_MARGIN * (rel / target.target_rel_stderr) ** 2
                add(
                    "error",
                    key,
                    f"relative error {rel:.3g} > {target.target_rel_stderr:g}",
                    first_step_with_effort(cur, need),
                )
    # outliers between widths (the check's warn rule)
    nn, _, sig = _branch_arrays(data, "adsorption")
    for t in ts:
        idx = np.flatnonzero(data.accessible[t])
        for pos in range(1, idx.size - 1):
            j, jl, jr = int(idx[pos]), int(idx[pos - 1]), int(idx[pos + 1])
            a = (w_all[jr] - w_all[j]) / (w_all[jr] - w_all[jl])
            lin = a * nn[t, jl] + (1 - a) * nn[t, jr]
            sd = np.sqrt(sig[t, j] ** 2 + (a * sig[t, jl]) ** 2 + ((1 - a) * sig[t, jr]) ** 2)
            nb = _neighbours(idx, pos, 2, 2)
            if nb.size >= 3:
                curv = np.abs(_lagrange(w_all[nb], nn[t, nb], float(w_all[j])) - lin)
            else:
                curv = np.zeros_like(lin)
            d = np.abs(nn[t, j] - lin)
            ok = np.isfinite(d) & np.isfinite(sd) & np.isfinite(curv)
            with np.errstate(divide="ignore", invalid="ignore"):
                score = np.where(ok, d / (OUTLIER_WARN[0] * sd + OUTLIER_WARN[1] * curv), 0.0)
            bad = np.flatnonzero(score > 1.0)
            for k in bad:
                key = (t, j, 0, int(k))
                add(
                    "outlier",
                    key,
                    f"{d[k] / sd[k]:.1f} sigma from its neighbours' interpolation "
                    f"({score[k]:.2f} x the warn tolerance)",
                    current(key) + 1,
                )
                if bad.size >= STRUCTURE_POINTS and out[-1][1] == key:
                    out[-1][0].structure = True
    return out


def dense_point(data: KernelData, key: tuple[int, int, int, int]) -> bool:
    """Whether point ``key`` = (t, j, branch, k) of a kernel is dense subcritical (its
    current density; :func:`gcmc.pipeline.escalation.is_dense_point`): only such a point has
    the certified escalation step."""
    t, j, b, k = key
    n = float(data.points[BRANCHES[b]]["density_per_nm3"][t, j, k])
    return is_dense_point(float(data.temperatures_K[t]), data.probe, n)


def _ladder_cpu(costs: dict[str, float], task: Task) -> float:
    return costs.get(task.key, float("nan"))


def plan_round(
    data: KernelData,
    layout: Layout,
    target: QualityTarget,
    costs: dict[str, float],
    spent_cpu_seconds: float,
    point_spent: dict[tuple[int, int, int, int], float],
    cpu_per_wall: dict[str, float] | None = None,
) -> RoundPlan:
    """The next round: new widths and point reruns, in priority order, cut to the budget.

    Parameters
    ----------
    data : KernelData
        The kernel assembled from ``layout``'s task files.
    layout : Layout
        Which task files ``data`` is made of (widths, ladders, point overrides).
    target : QualityTarget
        The target and the budget.
    costs : dict
        Measured CPU seconds of every task file so far, by task key.
    spent_cpu_seconds : float
        CPU seconds spent so far (every task file of every round).
    point_spent : dict
        Estimated CPU seconds already spent on reruns of each point.
    cpu_per_wall : dict, optional
        CPU over wall seconds of each task file, by task key: a point's recorded (wall)
        seconds times its task's ratio estimate its CPU cost (on a loaded machine the wall
        time is several times the CPU time). Default 1.

    Returns
    -------
    RoundPlan
    """
    ts = list(range(len(data.temperatures_K)))
    rp = RoundPlan()
    n_p = data.pressures_Pa.shape[1]
    # candidates: (priority, order, cost, apply)
    cands: list[tuple[tuple, float, Any]] = []
    for f, key, wanted in point_findings(data, layout, target, ts):
        t, j, b, k = key
        ladder = layout.ladders[t][j]
        # a point's cost: its own measured seconds at its current step, per unit of effort
        sec = data.points[BRANCHES[b]]["seconds"][t, j, k]
        cur = layout.overrides[key].step if key in layout.overrides else 0
        src = layout.overrides[key] if key in layout.overrides else ladder
        ratio = (cpu_per_wall or {}).get(src.key, 1.0)
        base = float(sec) * ratio / step(cur).cost_factor if np.isfinite(sec) and sec > 0 else 0.0
        if base == 0.0:
            base = _ladder_cpu(costs, ladder) / max(n_p * len(data.points), 1)
            base = base if np.isfinite(base) else 0.0
        if f.kind == "outlier" and (key in layout.overrides or f.structure):
            # resampled already and still an outlier, or an outlier at several pressures of
            # its width: structure in width, not a bad point
            f.detail += (
                "; confirmed by its rerun" if key in layout.overrides else "; at several pressures"
            )
            h = layout.widths_H_nm
            mids = [
                _snap(0.5 * (h[a] + h[c]))
                for a, c in ((j - 1, j), (j, j + 1))
                if 0 <= a and c < len(h) and h[c] - h[a] >= 2 * target.min_spacing_nm - 1e-9
            ]
            f.action = "widths" if mids else "unresolvable"
            f.detail += (
                ": new widths beside it"
                if mids
                else ": the widths beside it are at the minimum spacing "
                f"{target.min_spacing_nm:g} nm"
            )
            rp.findings.append(f)
            for mid in mids:
                cands.append(((5, -1e9, mid), base * n_p, ("width", mid, f.line())))
            continue
        last = last_step(dense_point(data, key))
        if wanted > last:
            f.action = "given_up"
            f.detail += f"; still failing after the last escalation step ({step(last).describe()})"
            rp.findings.append(f)
            continue
        cost = base * step(wanted).cost_factor
        budget = 0.0
        if step(wanted).point_method:
            # the certified step: what the earlier reruns left of the per-point budget, if
            # its first attempt fits in it
            left = target.cpu_seconds_per_point - point_spent.get(key, 0.0)
            if cost > left:
                f.action = "given_up"
                f.detail += (
                    f"; step {wanted} ({step(wanted).describe()}, first attempt ~{cost:.0f} "
                    f"CPU-s) would exceed what is left of the per-point budget "
                    f"({left:.0f} of {target.cpu_seconds_per_point:.0f} CPU-s)"
                )
                rp.findings.append(f)
                continue
            cost = budget = left
        elif point_spent.get(key, 0.0) + cost > target.cpu_seconds_per_point:
            f.action = "given_up"
            f.detail += (
                f"; step {wanted} ({step(wanted).describe()}, ~{cost:.0f} CPU-s) would exceed "
                f"the per-point budget {target.cpu_seconds_per_point:.0f} CPU-s"
            )
            rp.findings.append(f)
            continue
        task = Task(
            ladder.t_index,
            ladder.w_index,
            cost,
            h_code=ladder.h_code,
            point=k,
            branch=b,
            step=wanted,
            cpu_budget_s=budget,
        )
        f.detail += f"; rerun: {step(wanted).describe()}"
        if budget:
            f.detail += f", budget {budget:.0f} CPU-s"
        rp.findings.append(f)
        cands.append(((PRIORITY[f.kind], t, j, b, k), cost, ("rerun", task, key, f)))
    for f, new, (j0, j1) in gap_findings(data, target, ts):
        rp.findings.append(f)
        if not new:
            continue
        # cost of a new ladder: the mean measured cost of the two ladders beside it
        near = [_ladder_cpu(costs, row[jj]) for row in layout.ladders for jj in (j0, j1)]
        near = [c for c in near if np.isfinite(c)]
        each = float(np.mean(near)) / len(layout.ladders) if near else 0.0
        f.detail += "; new H " + ", ".join(f"{h:.4g}" for h in new) + " nm"
        for h in new:
            cands.append(((5, -f.ratio, h), each * len(layout.ladders), ("width", h, f.line())))
    cands.sort(key=lambda c: c[0])
    budget_left = target.cpu_seconds - spent_cpu_seconds
    have = set(layout.widths_H_nm)
    added: set[float] = set()
    for _, cost, act in cands:
        if act[0] == "width" and (act[1] in have or act[1] in added):
            continue
        label = (
            f"new width H = {act[1]:.4g} nm"
            if act[0] == "width"
            else f"rerun {act[1].key} ({act[3].kind})"
        )
        if cost > budget_left or budget_left <= 0:
            rp.cut_by_budget.append(label)
            if act[0] == "rerun":
                act[3].action = "budget"
            continue
        budget_left -= cost
        rp.estimated_cpu_seconds += cost
        if act[0] == "width":
            added.add(act[1])
            rp.widths.append((act[1], act[2]))
        else:
            rp.reruns.append((act[1], act[2], act[3].line()))
    return rp


def apply_round(layout: Layout, rp: RoundPlan, n_temperatures: int) -> Layout:
    """The layout after a round: new widths inserted in order, reruns as point overrides."""
    ladders = {
        (ti, h): layout.ladders[ti][j]
        for ti in range(n_temperatures)
        for j, h in enumerate(layout.widths_H_nm)
    }
    for h, _ in rp.widths:
        for ti in range(n_temperatures):
            ladders[(ti, h)] = added_width_task(ti, h)
    widths = tuple(sorted({h for _, h in ladders}))
    old_index = {h: j for j, h in enumerate(layout.widths_H_nm)}
    new_index = {h: j for j, h in enumerate(widths)}
    overrides = {}
    for (t, j, b, k), task in layout.overrides.items():
        overrides[(t, new_index[layout.widths_H_nm[j]], b, k)] = task
    for task, (t, j, b, k), _ in rp.reruns:
        overrides[(t, new_index[layout.widths_H_nm[j]], b, k)] = task
    del old_index
    return Layout(
        widths_H_nm=widths,
        ladders=[[ladders[(ti, h)] for h in widths] for ti in range(n_temperatures)],
        overrides=overrides,
    )


def round_tasks(rp: RoundPlan, n_temperatures: int) -> list[Task]:
    """The task list of a round (ladders of new widths at every temperature, and reruns),
    most expensive first."""
    tasks = [added_width_task(ti, h) for h, _ in rp.widths for ti in range(n_temperatures)]
    tasks += [task for task, _, _ in rp.reruns]
    return sorted(tasks, key=lambda t: (-t.estimated_cost, t.key))
