"""Escalating effort for points the first pass could not certify: the steps, and the run of
one point at a step.

A point of a pressure ladder that is unconverged, flagged, above the error target, off the
exact Henry law or an outlier between widths is rerun alone (a cold start: the first replica
from an empty pore, the second over-filled, so that the two bracket the answer) at the next
step of :data:`STEPS`: first longer runs, then the next sampling method the sampler offers
(biased insertion from the start, then a third replica). Each rerun has its own random stream,
derived from the config's seed and the rerun's coordinates (width, branch, point, step), so
a rerun is as reproducible as the ladder it replaces a point of. A point that still fails
after the last step, or whose next step would exceed the per-point budget, is reported, not
rerun again.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from gcmc.kernel.data import POINT_FIELDS

if TYPE_CHECKING:
    from gcmc.pipeline.tasks import BuildPlan, Task
    from gcmc.sampling.point import SamplingSettings


@dataclass(frozen=True)
class Step:
    """One escalation step: a sampling method and the effort (multiple of the config's
    equilibration and production moves)."""

    method: str  # "auto insertion", "biased insertion" or "biased insertion, 3 replicas"
    effort: float
    replicas: int = 0  # 0: the config's

    @property
    def cost_factor(self) -> float:
        """Cost relative to one point of the config's ladder (replicas cost in proportion)."""
        return self.effort * (max(self.replicas, 2) / 2.0)

    def describe(self) -> str:
        return f"{self.method}, {self.effort:g}x moves"


#: the escalation ladder; step s (1-based) is STEPS[s - 1]. A better sampler (e.g. a
#: flat-histogram method for frozen dense phases) plugs in here as a further step.
STEPS: tuple[Step, ...] = (
    Step("auto insertion", 2.0),
    Step("auto insertion", 4.0),
    Step("biased insertion", 4.0),
    Step("biased insertion, 3 replicas", 8.0, replicas=3),
)

#: what the config's own ladder point counts as (step 0)
BASE = Step("ladder", 1.0)


def step(index: int) -> Step:
    """Step ``index`` (0: the ladder itself)."""
    return BASE if index == 0 else STEPS[index - 1]


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
    """The first step after ``current`` whose effort is at least ``effort`` (the last step
    if none is; len(STEPS) + 1 when ``current`` is already the last)."""
    for i in range(current + 1, len(STEPS) + 1):
        if step(i).effort >= effort:
            return i
    return len(STEPS) if current < len(STEPS) else len(STEPS) + 1


def run_point_task(plan: BuildPlan, task: Task) -> Path:
    """Rerun one point (a cold start at the task's escalation step); write its task file."""
    from gcmc.physics.henry import pore_limit
    from gcmc.pipeline.tasks import (
        BRANCHES,
        finish_task,
        point_field,
        point_state,
        pore_model,
        task_seed,
    )
    from gcmc.sampling.point import simulate_point

    cfg = plan.config
    tp = plan.temperatures[task.t_index]
    model = pore_model(cfg, task.w_index, task.width_H_nm(cfg))
    k = task.point
    state = point_state(cfg, tp, k)
    settings = step_settings(cfg.sampling, task.step)
    t0, c0 = time.perf_counter(), time.process_time()
    out = simulate_point(model, state, settings, task_seed(cfg, task), start=None)
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    r = out.result
    arrays: dict[str, np.ndarray] = {}
    for name in POINT_FIELDS:
        arrays[f"point/{name}"] = np.array(float(point_field(r, name)))
    limit = pore_limit(model, tp.temperature_K)
    meta = {
        "task": task.key,
        "t_index": task.t_index,
        "width_H_nm": model.width_nm,
        "branch": BRANCHES[task.branch],
        "point": k,
        "step": task.step,
        "method": step(task.step).method,
        "effort": step(task.step).effort,
        "flags": "; ".join(r.flags),
        "seconds": seconds,
        "seed_entropy": int(cfg.seed),
        "spawn_key": list(task.spawn_key()),
    }
    import json

    arrays["henry_per_nm3_per_pa"] = np.array(limit.henry_per_nm3_per_pa)
    arrays["accessible"] = np.array(limit.accessible)
    arrays["seconds"] = np.array(seconds)
    arrays["cpu_seconds"] = np.array(cpu)
    arrays["meta_json"] = np.frombuffer(json.dumps(meta, sort_keys=True).encode(), dtype=np.uint8)
    return finish_task(plan, task, arrays)
