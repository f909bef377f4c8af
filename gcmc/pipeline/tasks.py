"""Kernel builds: plan the grid, run tasks (one temperature x one width: a pressure ladder),
persist each task atomically, then fit and write the kernel library.

The kernel is assembled only from the task files on disk, so an interrupted build resumed by
the same command, a build with any number of workers or MPI ranks, and an uninterrupted build
all produce the same kernel data, bit for bit. Each task's random stream is derived from the
config's seed and the task's coordinates (numpy SeedSequence), never from the order of work.
"""

from __future__ import annotations

import json
import math
import os
import socket
import time
import traceback
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from gcmc.errors import InputError
from gcmc.files import atomic_write, atomic_write_text
from gcmc.kernel.data import POINT_FIELDS
from gcmc.physics.model import SLIT, PoreModel
from gcmc.pipeline import faults
from gcmc.pipeline.config import RunConfig

BRANCHES = ("adsorption", "desorption")


@dataclass(frozen=True)
class TemperaturePlan:
    """The bulk states of one temperature's pressure grid, from the equation of state."""

    temperature_K: float
    saturation_pressure_Pa: float
    pressures_Pa: np.ndarray
    relative_pressures: np.ndarray
    fugacities_Pa: np.ndarray
    bulk_density_per_nm3: np.ndarray
    residual_enthalpy_K: np.ndarray


@dataclass(frozen=True)
class Task:
    """One task: a pressure ladder at one temperature and one width."""

    t_index: int
    w_index: int
    estimated_cost: float

    @property
    def key(self) -> str:
        """The task's name in file names and logs, ``t<T>_w<W>``."""
        return f"t{self.t_index:03d}_w{self.w_index:03d}"


@dataclass(frozen=True)
class BuildPlan:
    """A planned build: the config, the bulk states per temperature and the tasks."""

    config: RunConfig
    temperatures: list[TemperaturePlan]
    tasks: list[Task]  # most expensive first
    task_dir: Path
    eos_parameters: dict

    @property
    def n_points(self) -> int:
        """Points the build simulates (both branches counted)."""
        per = len(self.config.pressures.values) * (2 if self.config.pressures.descending else 1)
        return per * len(self.tasks)


def make_plan(cfg: RunConfig) -> BuildPlan:
    """Thermodynamic states per temperature and the task list, before any simulation."""
    from gcmc.physics.eos import make_eos
    from gcmc.pipeline.cost import estimate_task_cost

    eos = make_eos(cfg.eos, cfg.probe)
    temps = []
    for t in cfg.temperatures_K:
        vals = np.array(cfg.pressures.values, dtype=float)
        if cfg.pressures.kind == "relative":
            p0 = float(eos.saturation_pressure(t))
            pressures = vals * p0
            rel = vals
        else:
            try:
                p0 = float(eos.saturation_pressure(t))
            except InputError:
                p0 = float("nan")
            pressures = vals
            rel = pressures / p0 if math.isfinite(p0) else np.full_like(vals, np.nan)
        states = [eos.state(t, float(p)) for p in pressures]
        temps.append(
            TemperaturePlan(
                temperature_K=t,
                saturation_pressure_Pa=p0,
                pressures_Pa=pressures,
                relative_pressures=rel,
                fugacities_Pa=np.array([s.fugacity_Pa for s in states]),
                bulk_density_per_nm3=np.array([s.density_per_nm3 for s in states]),
                residual_enthalpy_K=np.array([s.residual_enthalpy_K for s in states]),
            )
        )
    tasks = []
    s = cfg.sampling
    for ti, tp in enumerate(temps):
        for wi in range(len(cfg.widths_H_nm)):
            # A-priori cost (gcmc.pipeline.cost): where the pore fills and biased insertion switches
            # on, and the neighbours per move. Learned costs replace it on resume.
            cost = estimate_task_cost(
                pore_model(cfg, wi),
                tp.temperature_K,
                tp.fugacities_Pa,
                moves_per_point=s.equilibration_moves + s.production_moves,
                insertion_trials=s.insertion_trials,
                biased_trials=s.biased_trials,
                displacement_fraction=s.displacement_fraction,
                branches=2 if cfg.pressures.descending else 1,
                replicas=s.replicas,
            )
            tasks.append(Task(ti, wi, cost))
    tasks.sort(key=lambda k: (-k.estimated_cost, k.t_index, k.w_index))
    task_dir = cfg.output / f"{cfg.name}.tasks" / cfg.config_hash[:16]
    return BuildPlan(
        config=cfg,
        temperatures=temps,
        tasks=tasks,
        task_dir=task_dir,
        eos_parameters=eos.parameters(),
    )


def task_seed(cfg: RunConfig, task: Task) -> np.random.SeedSequence:
    """The random seed of a task: ``SeedSequence(seed, spawn_key=(t, w))``."""
    return np.random.SeedSequence(entropy=cfg.seed, spawn_key=(task.t_index, task.w_index))


def pore_model(cfg: RunConfig, w_index: int) -> PoreModel:
    """The pore model of one kernel width."""
    return PoreModel(
        probe=cfg.probe,
        solid=cfg.solid,
        geometry=SLIT,
        cutoff_nm=cfg.cutoff_nm,
        box_nm=cfg.box_nm,
        width_nm=cfg.widths_H_nm[w_index],
        box_y_nm=cfg.box_y_nm,
        lateral_box=cfg.lateral_box,
    )


def task_path(plan: BuildPlan, task: Task) -> Path:
    """The task's result file (.npz)."""
    return plan.task_dir / f"{task.key}.npz"


def failure_path(plan: BuildPlan, task: Task) -> Path:
    """The task's failure record (.json)."""
    return plan.task_dir / f"{task.key}.failed.json"


# --- one task ---------------------------------------------------------------------------------


def run_task(plan: BuildPlan, task: Task) -> Path:
    """Run the pressure ladder of one (temperature, width); write its file atomically."""
    from gcmc.physics.henry import pore_limit
    from gcmc.sampling.point import ThermoState, simulate_point

    faults.check_task(task.key)  # the test seam (gcmc.pipeline.faults); nothing in real builds
    cfg = plan.config
    tp = plan.temperatures[task.t_index]
    model = pore_model(cfg, task.w_index)
    limit = pore_limit(model, tp.temperature_K)
    n_p = len(tp.pressures_Pa)
    arrays: dict[str, np.ndarray] = {}
    flags: dict[str, list[str]] = {}
    seeds = task_seed(cfg, task)
    point_seeds = seeds.spawn(2 * n_p)
    t_start = time.perf_counter()
    branches = BRANCHES if cfg.pressures.descending else BRANCHES[:1]
    positions = None
    dmax = None
    for b, branch in enumerate(branches):
        for name in POINT_FIELDS:
            arrays[f"{branch}/{name}"] = np.full(n_p, np.nan)
        flags[branch] = [""] * n_p
        order = range(n_p) if branch == "adsorption" else range(n_p - 1, -1, -1)
        states = [
            ThermoState(
                temperature_K=tp.temperature_K,
                fugacity_Pa=float(tp.fugacities_Pa[k]),
                pressure_Pa=float(tp.pressures_Pa[k]),
                bulk_density_per_nm3=float(tp.bulk_density_per_nm3[k]),
                residual_enthalpy_K=float(tp.residual_enthalpy_K[k]),
                eos=cfg.eos,
            )
            for k in range(n_p)
        ]
        if cfg.sampling.replica_exchange:  # configuration swaps along the ladder (sampling.ladder)
            from gcmc.sampling.ladder import simulate_ladder

            ladder = simulate_ladder(
                model,
                states,
                cfg.sampling,
                point_seeds[b * n_p],
                starts=[positions] * n_p,
                max_displacement_nm=dmax,
            )
        for k in order:
            state = states[k]
            if cfg.sampling.replica_exchange:
                out = ladder.points[k]
            else:
                out = simulate_point(
                    model,
                    state,
                    cfg.sampling,
                    point_seeds[b * n_p + k],
                    start=positions,
                    max_displacement_nm=dmax,
                )
            positions, dmax = out.positions, out.max_displacement_nm or None
            r = out.result
            for name in POINT_FIELDS:
                if name == "insertion_acceptance":
                    val = r.acceptance.get("insertion", np.nan)
                elif name == "converged":
                    val = 1.0 if r.converged else 0.0
                else:
                    val = getattr(r, name)
                arrays[f"{branch}/{name}"][k] = val
            flags[branch][k] = "; ".join(r.flags)
    seconds = time.perf_counter() - t_start
    meta = {
        "task": task.key,
        "t_index": task.t_index,
        "w_index": task.w_index,
        "temperature_K": tp.temperature_K,
        "width_H_nm": model.width_nm,
        "flags": flags,
        "host": socket.gethostname(),
        "seconds": seconds,
        "seed_entropy": int(cfg.seed),
        "spawn_key": [task.t_index, task.w_index],
    }
    arrays["henry_per_nm3_per_pa"] = np.array(limit.henry_per_nm3_per_pa)
    arrays["accessible"] = np.array(limit.accessible)
    arrays["seconds"] = np.array(seconds)
    arrays["meta_json"] = np.frombuffer(json.dumps(meta, sort_keys=True).encode(), dtype=np.uint8)
    path = task_path(plan, task)
    _atomic_savez(path, arrays)
    fail = failure_path(plan, task)
    if fail.exists():
        fail.unlink()
    return path


def _atomic_savez(path: Path, arrays: dict[str, np.ndarray]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_write(path, "wb") as fh:
        np.savez(fh, **arrays)


def load_task(path: Path) -> tuple[dict[str, np.ndarray], dict]:
    """A task file's arrays and its metadata dict."""
    with np.load(path) as z:
        arrays = {k: z[k] for k in z.files}
    meta = json.loads(arrays.pop("meta_json").tobytes().decode())
    return arrays, meta


def run_task_safely(plan: BuildPlan, task: Task) -> tuple[str, float, str]:
    """Run a task, never raising: returns (status, seconds, message)."""
    t0 = time.perf_counter()
    try:
        run_task(plan, task)
        return "done", time.perf_counter() - t0, ""
    except Exception as exc:  # a failed task must not take the others down
        tp = plan.temperatures[task.t_index]
        msg = (
            f"task {task.key} (T = {tp.temperature_K:g} K, H = "
            f"{plan.config.widths_H_nm[task.w_index]:g} nm) failed: "
            f"{type(exc).__name__}: {exc}"
        )
        record = {"task": task.key, "error": msg, "traceback": traceback.format_exc()}
        fail = failure_path(plan, task)
        fail.parent.mkdir(parents=True, exist_ok=True)
        atomic_write_text(fail, json.dumps(record, indent=1))
        return "failed", time.perf_counter() - t0, msg


# --- worker-process entry point ------------------------------------------------------------


def _worker_init() -> None:
    """Pool worker start-up: imports and the compiled engine (from numba's cache), done while
    the parent still prepares the plan (gcmc.pipeline.runner.start_local_pool)."""
    os.environ.setdefault("NUMBA_NUM_THREADS", "1")
    from gcmc.sampling.box import warm_up

    warm_up()


def _worker_ping() -> int:
    """A no-op job: submitting one per worker makes the pool start them all at once."""
    return os.getpid()


def _worker_run(plan: BuildPlan, t_index: int, w_index: int) -> tuple[str, str, float, str]:
    # The parent's plan itself (pickled, a few kB, with every task): a worker does not re-read
    # the config (which may have been edited since the build started) nor redo the EOS states.
    task = next(t for t in plan.tasks if t.t_index == t_index and t.w_index == w_index)
    status, seconds, msg = run_task_safely(plan, task)
    return task.key, status, seconds, msg


def pending_tasks(plan: BuildPlan) -> list[Task]:
    """The plan's tasks without a result file, in the plan's order."""
    return [t for t in plan.tasks if not task_path(plan, t).exists()]


def learned_order(plan: BuildPlan, tasks: list[Task]) -> list[Task]:
    """Most expensive first: the a-priori estimate rescaled by the measured cost of finished
    tasks at neighbouring widths (or of all finished tasks), so that a resumed build learns
    from what it already did."""
    measured: dict[tuple[int, int], float] = {}
    for t in plan.tasks:
        p = task_path(plan, t)
        if p.exists():
            try:
                arrays, _ = load_task(p)
                measured[(t.t_index, t.w_index)] = float(arrays["seconds"])
            except Exception:  # a damaged file is simply re-run
                p.unlink(missing_ok=True)
    if not measured:
        return tasks
    estimate = {(t.t_index, t.w_index): t.estimated_cost for t in plan.tasks}
    ratios = [measured[k] / estimate[k] for k in measured if estimate[k] > 0]
    est_ratio = float(np.median(ratios)) if ratios else 1.0  # blocked pores are estimated 0

    def cost(t: Task) -> float:
        # the a-priori estimate's shape, scaled by what neighbouring widths really cost
        near = [
            measured[k] / estimate[k]
            for k in measured
            if k[0] == t.t_index and abs(k[1] - t.w_index) <= 1 and estimate[k] > 0
        ]
        return estimate[(t.t_index, t.w_index)] * (float(np.median(near)) if near else est_ratio)

    return sorted(tasks, key=lambda t: (-cost(t), t.t_index, t.w_index))
