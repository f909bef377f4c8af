"""Escalating effort for points the first pass could not certify: the steps, and the run of
one point at a step.

A point of a pressure ladder that is unconverged, flagged, above the error target, off the
exact Henry law or an outlier between widths is rerun alone (a cold start: the first replica
from an empty pore, the second over-filled, so that the two bracket the answer) at the next
step of :data:`STEPS`: first longer runs, then the next sampling method the sampler offers
(biased insertion from the start, then a third replica).

A **dense subcritical** point (at most 0.82 of the probe's critical temperature, so that the
certificate's hot rungs have room below 0.9 T_c; pore filled beyond
:data:`gcmc.sampling.certificate.DENSE_FILLING`: :func:`is_dense_point`) has one step more
after those, :data:`CERTIFIED`: the certificate of a filled point
(:func:`gcmc.sampling.certificate.certify_filled_point`, method ``"certified-tempering"`` of
its POINT_METHODS): four independent hyper-parallel tempering preparations that must agree
within 1 %, renew their content and pass a box-size check. Its CPU budget is what the point's
earlier reruns left of the target's per-point budget (``cpu_budget_s`` of the rerun's
:class:`gcmc.pipeline.tasks.Task`, set by the planner); its moves per rung are the config's,
doubled by the certificate while the budget allows. Every other point (supercritical, or
not filled) escalates through :data:`STEPS` only, exactly as without this step:
:func:`steps_for` and :func:`last_step` say which steps a point has.

Each rerun has its own random stream, derived from the config's seed and the rerun's
coordinates (width, branch, point, step: :func:`gcmc.pipeline.tasks.task_seed`), so a rerun is
as reproducible as the ladder it replaces a point of (the certified step stops by CPU time,
so how many attempts it makes depends on the machine; the task file, once written, is what
the kernel is assembled from). A point that still fails after its last step, or whose next
step would exceed the per-point budget, is reported, not rerun again. The task file of every
step holds the same fields (``point/<field>``, seconds, CPU seconds, and the method in its
meta), so the kernel's provenance and ``gcmc show`` name the method that produced the point.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from gcmc.kernel.data import POINT_FIELDS

if TYPE_CHECKING:
    from gcmc.physics.model import PoreModel
    from gcmc.pipeline.tasks import BuildPlan, Task
    from gcmc.sampling.certificate import CertifySettings
    from gcmc.sampling.point import SamplingSettings, ThermoState


@dataclass(frozen=True)
class Step:
    """One escalation step: a sampling method and the effort (multiple of the config's
    equilibration and production moves; for the certified step, per rung of each chain)."""

    method: str  # "auto insertion", "biased insertion", "biased insertion, 3 replicas", ...
    effort: float
    replicas: int = 0  # 0: the config's
    #: the name of the point method in gcmc.sampling.certificate.POINT_METHODS ("": the
    #: point-wise sampler, gcmc.sampling.point.simulate_point)
    point_method: str = ""

    @property
    def cost_factor(self) -> float:
        """Cost relative to one point of the config's ladder (replicas cost in proportion;
        the certified step: its first attempt, :func:`certified_cost_factor`)."""
        if self.point_method:
            return self.effort * certified_cost_factor()
        return self.effort * (max(self.replicas, 2) / 2.0)

    def describe(self) -> str:
        """The step in words (for findings and the build's log)."""
        if self.point_method:
            return f"{self.method}, {self.effort:g}x moves per rung"
        return f"{self.method}, {self.effort:g}x moves"


#: the escalation ladder of every point; step s (1-based) is STEPS[s - 1]
STEPS: tuple[Step, ...] = (
    Step("auto insertion", 2.0),
    Step("auto insertion", 4.0),
    Step("biased insertion", 4.0),
    Step("biased insertion, 3 replicas", 8.0, replicas=3),
)


@functools.cache
def certified_cost_factor() -> float:
    """The first attempt of the certificate (its default chains) in ladder points at the
    config's moves: four preparations of hot_rungs + 1 rungs each, the larger box's
    ceil(hot_rungs x box_scale) + 1 rungs (moves cost about the same in either box: the
    neighbours within the cutoff do not grow with the box), and the annealed preparation's
    cooling path (about one equilibration per rung, counted as a full rung here), over the
    two replicas of a ladder point."""
    import math

    from gcmc.sampling.certificate import PREPARATIONS, CertifySettings

    cs = CertifySettings()
    rungs = cs.hot_rungs + 1
    big = math.ceil(cs.hot_rungs * cs.box_scale) + 1
    return (len(PREPARATIONS) * rungs + big + rungs) / 2.0


#: the last step of a dense subcritical point only (module docstring): the certificate
CERTIFIED = Step(
    "certified tempering",
    1.0,
    replicas=1,
    point_method="certified-tempering",
)

#: what the config's own ladder point counts as (step 0)
BASE = Step("ladder", 1.0)


def steps_for(dense: bool) -> tuple[Step, ...]:
    """The escalation steps of a point: :data:`STEPS`, and :data:`CERTIFIED` after them for
    a dense subcritical point (``dense``: :func:`is_dense_point`)."""
    return (*STEPS, CERTIFIED) if dense else STEPS


def last_step(dense: bool) -> int:
    """The index of a point's last escalation step (a wanted step beyond it: given up)."""
    return len(steps_for(dense))


def step(index: int) -> Step:
    """Step ``index`` (0: the ladder itself; len(STEPS) + 1: :data:`CERTIFIED`, which only
    dense subcritical points reach)."""
    if index == 0:
        return BASE
    if index == len(STEPS) + 1:
        return CERTIFIED
    return STEPS[index - 1]


def is_dense_point(
    temperature_K: float, probe: dict, density_per_nm3: float, geometry: str = "slit"
) -> bool:
    """Whether a kernel point is dense subcritical: the certificate's own predicate
    (:func:`gcmc.sampling.certificate.is_dense_subcritical`) on the kernel's numbers: the
    probe (a kernel's ``probe`` dict: ``critical_temperature_K``, ``sigma_nm``), the point's
    temperature and pore density (per pore volume, as the kernel stores it). A probe without
    a critical temperature is never dense subcritical; a NaN density neither."""
    from gcmc.sampling.certificate import dense_subcritical_state

    tc = float(probe.get("critical_temperature_K", float("nan")))
    sigma = float(probe.get("sigma_nm", float("nan")))
    return dense_subcritical_state(geometry, temperature_K, tc, sigma, float(density_per_nm3))


def step_settings(base: SamplingSettings, index: int) -> SamplingSettings:
    """The sampling settings of an escalation step."""
    s = step(index)
    if index == 0:
        return base
    out = replace(
        base,
        equilibration_moves=int(round(base.equilibration_moves * s.effort)),
        production_moves=int(round(base.production_moves * s.effort)),
        max_production_moves=int(round(base.max_production_moves * s.effort)),
        replica_exchange=False,
    )
    if s.method.startswith("biased"):
        out = replace(out, insertion_trials=base.biased_trials)
    if s.replicas:
        out = replace(out, replicas=max(s.replicas, base.replicas))
    return out


def first_step_with_effort(current: int, effort: float) -> int:
    """The first step of :data:`STEPS` after ``current`` whose effort is at least ``effort``
    (the last of STEPS if none is); ``current + 1`` when ``current`` is already the last of
    STEPS or beyond: the certified step for a dense subcritical point, given up for any other
    (the caller compares with :func:`last_step`)."""
    for i in range(current + 1, len(STEPS) + 1):
        if step(i).effort >= effort:
            return i
    return len(STEPS) if current < len(STEPS) else current + 1


#: CPU microseconds per unit of gcmc.pipeline.cost's per-move estimate, for turning a
#: certificate's CPU budget into a move budget (measured: tempering chains of argon in a filled
#: 3 sigma pore at 87.3 K, biased insertion k = 64, about 2 us per move for an estimate of
#: about 200 units; benchmarks/README.md, "Dense confined phases"). Only the number of the
#: certificate's attempts depends on it, never a result for a given number of attempts.
US_PER_COST_UNIT = 0.01


def certificate_move_budget(
    model: PoreModel, state: ThermoState, cs: CertifySettings, budget_cpu_s: float
) -> int:
    """The certificate's budget in production moves per rung: the largest production of the
    doubling attempts (production_moves x 2^k) whose attempts together fit into
    ``budget_cpu_s`` by the a-priori cost estimate (gcmc.pipeline.cost at the point's state,
    the kernel rung's cost for every rung: hotter rungs hold less); at least the first
    attempt's. A function of the config alone, so that a resumed build certifies the same."""
    from gcmc.pipeline.cost import estimate_task_cost
    from gcmc.sampling.certificate import attempt_moves

    per_move = estimate_task_cost(
        model,
        state.temperature_K,
        np.array([state.fugacity_Pa]),
        1.0,
        cs.insertion_trials,
        64,
        0.5,
    )
    seconds_per_move = max(per_move, 1.0) * US_PER_COST_UNIT * 1e-6
    production = cs.production_moves
    spent = attempt_moves(model, cs, production) * seconds_per_move
    nxt = attempt_moves(model, cs, 2 * production) * seconds_per_move
    while spent + nxt <= budget_cpu_s:
        production *= 2
        spent += nxt
        nxt = attempt_moves(model, cs, 2 * production) * seconds_per_move
    return production


def certify_settings(
    base: SamplingSettings,
    budget_cpu_s: float,
    model: PoreModel | None = None,
    state: ThermoState | None = None,
) -> CertifySettings:
    """The certificate's settings at the certified step: the config's moves per rung
    (equilibration, production, sampling interval, insertion method, over-fill) times the
    step's effort, and the CPU budget; every other field the certificate's default. With the
    point's ``model`` and ``state``, the budget is also given in moves
    (:func:`certificate_move_budget`), which the certificate then uses instead of process
    time: the point is the same on any machine and after a resume."""
    from gcmc.sampling.certificate import CertifySettings

    e = CERTIFIED.effort
    cs = CertifySettings(
        equilibration_moves=int(round(base.equilibration_moves * e)),
        production_moves=int(round(base.production_moves * e)),
        sample_every=base.sample_every,
        overfill_factor=base.overfill_factor,
        insertion_trials=base.insertion_trials,
        budget_cpu_s=float(budget_cpu_s),
    )
    if model is None or state is None:
        return cs
    return replace(cs, max_production_moves=certificate_move_budget(model, state, cs, budget_cpu_s))


def run_point_task(plan: BuildPlan, task: Task) -> Path:
    """Rerun one point (a cold start at the task's escalation step); write its task file.

    At the certified step (``task.step == len(STEPS) + 1``) the point is certified instead
    (:func:`gcmc.sampling.certificate.certify_filled_point`, by its POINT_METHODS name) with
    :func:`certify_settings` and the CPU budget ``task.cpu_budget_s`` (the target's per-point
    budget when the task carries none); the task file has the same fields, its meta the
    method and a summary of the certificate.
    """
    from gcmc.physics.henry import pore_limit
    from gcmc.pipeline.tasks import (
        BRANCHES,
        point_field,
        point_state,
        pore_model,
        task_clock,
        task_seed,
        write_task,
    )
    from gcmc.sampling.point import simulate_point

    cfg = plan.config
    tp = plan.temperatures[task.t_index]
    model = pore_model(cfg, task.w_index, task.width_H_nm(cfg))
    k = task.point
    state = point_state(cfg, tp, k)
    s = step(task.step)
    extra: dict = {}
    started = task_clock()
    if s.point_method:
        from gcmc.physics.eos import make_eos
        from gcmc.sampling.certificate import POINT_METHODS

        budget = task.cpu_budget_s
        if not budget > 0.0:
            budget = cfg.target.cpu_seconds_per_point if cfg.target is not None else 0.0
        if not budget > 0.0:
            raise ValueError(f"task {task.key}: the certified step needs a CPU budget > 0")
        cs = certify_settings(cfg.sampling, budget, model, state)
        eos = make_eos(cfg.eos, cfg.probe)
        cert = POINT_METHODS[s.point_method](model, state, task_seed(cfg, task), cs, eos)
        r = cert.result
        extra = {
            "point_method": s.point_method,
            "cpu_budget_s": float(budget),
            "certificate": {
                "certified": bool(cert.certified),
                "density_spread_rel": float(cert.density_spread_rel),
                "box_difference_rel": float(cert.box_difference_rel),
                "min_renewals": int(cert.min_renewals),
                "production_moves_per_rung": int(cert.production_moves),
                "preparations": {
                    p.name: float(p.density_per_nm3)
                    for p in [*cert.preparations, *([cert.box_check] if cert.box_check else [])]
                },
            },
        }
    else:
        settings = step_settings(cfg.sampling, task.step)
        # a cold start; with second_replica = "branch" (hysteresis kernels) every replica
        # starts on its branch's side, so that a rerun stays on the metastable branch:
        # adsorption from the empty pore, desorption over-filled
        above = settings.second_replica == "branch" and BRANCHES[task.branch] == "desorption"
        r = simulate_point(
            model, state, settings, task_seed(cfg, task), start=None, from_above=above
        ).result
    arrays: dict[str, np.ndarray] = {}
    for name in POINT_FIELDS:
        arrays[f"point/{name}"] = np.array(float(point_field(r, name)))
    limit = pore_limit(model, tp.temperature_K)
    meta = {
        "t_index": task.t_index,
        "width_H_nm": model.width_nm,
        "branch": BRANCHES[task.branch],
        "point": k,
        "step": task.step,
        "method": s.method,
        "effort": s.effort,
        "flags": "; ".join(r.flags),
        **extra,
    }
    arrays["henry_per_nm3_per_pa"] = np.array(limit.henry_per_nm3_per_pa)
    arrays["accessible"] = np.array(limit.accessible)
    return write_task(plan, task, arrays, meta, started)
