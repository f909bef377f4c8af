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
from typing import TYPE_CHECKING

import numpy as np

from gcmc.errors import InputError
from gcmc.files import atomic_write, atomic_write_text
from gcmc.kernel.data import POINT_FIELDS
from gcmc.physics.model import SLIT, PoreModel
from gcmc.pipeline import faults
from gcmc.pipeline.config import RunConfig

if TYPE_CHECKING:
    from gcmc.sampling.point import PointResult, ThermoState

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


#: added widths are coded as H in units of this (nm) in their task key and seed
H_CODE_NM = 1e-5
#: spawn-key offsets that keep added widths and point reruns apart from the config's grid
ADDED_WIDTH_KEY = 10_000_000
RERUN_KEY = 1_000_000
#: spawn-key word of an equilibrium anchor path task (gcmc.pipeline.anchor)
ANCHOR_KEY = 2_000_000


@dataclass(frozen=True)
class Task:
    """One unit of work: the pressure ladder of one (temperature, width), or the rerun of one
    point of such a ladder at an escalation step (:mod:`gcmc.pipeline.escalation`).

    ``w_index`` indexes the config's widths; a width added by refinement has ``w_index = -1``
    and ``h_code`` = H / H_CODE_NM. A point rerun has ``point >= 0`` (index on the pressure
    axis), its ``branch`` (0 adsorption, 1 desorption) and ``step`` (1, 2, ...); a rerun at
    the certified step carries its CPU budget ``cpu_budget_s`` (set by the planner; not part
    of the key nor of the random stream). An equilibrium anchor task (``anchor``: a tag of the
    ``[equilibrium]`` settings, part of the key, so that changed settings do not reuse a
    path) runs the reversible path of one (temperature, width) (:mod:`gcmc.pipeline.anchor`)."""

    t_index: int
    w_index: int
    estimated_cost: float
    h_code: int = -1
    point: int = -1
    branch: int = 0
    step: int = 0
    cpu_budget_s: float = 0.0
    anchor: str = ""  # an anchor path task: the tag of its [equilibrium] settings

    @property
    def width_key(self) -> str:
        """The key of the (temperature, width) ladder this task belongs to."""
        if self.h_code >= 0:
            return f"t{self.t_index:03d}_h{self.h_code:07d}"
        return f"t{self.t_index:03d}_w{self.w_index:03d}"

    @property
    def key(self) -> str:
        if self.point >= 0:
            return f"{self.width_key}_b{self.branch}p{self.point:03d}s{self.step}"
        if self.anchor:
            return f"{self.width_key}_eq{self.anchor}"
        return self.width_key

    @property
    def is_rerun(self) -> bool:
        return self.point >= 0

    @property
    def is_single(self) -> bool:
        """Not a pressure ladder: a point rerun or an anchor path (counted apart in progress)."""
        return self.point >= 0 or bool(self.anchor)

    def ladder(self) -> Task:
        """The ladder task this task reruns a point of (itself for a ladder task)."""
        return Task(self.t_index, self.w_index, 0.0, h_code=self.h_code)

    def width_H_nm(self, cfg: RunConfig) -> float:
        if self.h_code >= 0:
            return round(self.h_code * H_CODE_NM, 10)
        return float(cfg.widths_H_nm[self.w_index])

    def spawn_key(self) -> tuple[int, ...]:
        w = ADDED_WIDTH_KEY + self.h_code if self.h_code >= 0 else self.w_index
        if self.point >= 0:
            return (self.t_index, w, RERUN_KEY, self.branch, self.point, self.step)
        if self.anchor:
            return (self.t_index, w, ANCHOR_KEY)
        return (self.t_index, w)


def added_width_task(t_index: int, width_H_nm: float, cost: float = 0.0) -> Task:
    """The ladder task of a width added by refinement (H rounded to H_CODE_NM)."""
    return Task(t_index, -1, cost, h_code=int(round(width_H_nm / H_CODE_NM)))


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
    task_dir = cfg.output / f"{cfg.name}.tasks" / cfg.task_hash[:16]
    return BuildPlan(
        config=cfg,
        temperatures=temps,
        tasks=tasks,
        task_dir=task_dir,
        eos_parameters=eos.parameters(),
    )


def task_seed(cfg: RunConfig, task: Task) -> np.random.SeedSequence:
    return np.random.SeedSequence(entropy=cfg.seed, spawn_key=task.spawn_key())


def pore_model(cfg: RunConfig, w_index: int, width_H_nm: float | None = None) -> PoreModel:
    """The slit pore of the config's width ``w_index`` (or of ``width_H_nm`` when given)."""
    return PoreModel(
        probe=cfg.probe,
        solid=cfg.solid,
        geometry=SLIT,
        cutoff_nm=cfg.cutoff_nm,
        box_nm=cfg.box_nm,
        width_nm=cfg.widths_H_nm[w_index] if width_H_nm is None else width_H_nm,
        box_y_nm=cfg.box_y_nm,
        lateral_box=cfg.lateral_box,
    )


def point_state(cfg: RunConfig, tp: TemperaturePlan, k: int) -> ThermoState:
    """The bulk state of pressure point ``k`` of a temperature's plan (the config's EOS)."""
    from gcmc.sampling.point import ThermoState

    return ThermoState(
        temperature_K=tp.temperature_K,
        fugacity_Pa=float(tp.fugacities_Pa[k]),
        pressure_Pa=float(tp.pressures_Pa[k]),
        bulk_density_per_nm3=float(tp.bulk_density_per_nm3[k]),
        residual_enthalpy_K=float(tp.residual_enthalpy_K[k]),
        eos=cfg.eos,
    )


def point_field(r: PointResult, name: str) -> float:
    """The value a task file stores for field ``name`` of POINT_FIELDS (the insertion
    acceptance, NaN if none; ``converged`` as 1.0 or 0.0; else the attribute)."""
    if name == "insertion_acceptance":
        return r.acceptance.get("insertion", np.nan)
    if name == "converged":
        return 1.0 if r.converged else 0.0
    return getattr(r, name)


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
    from gcmc.sampling.point import simulate_point

    faults.check_task(task.key)  # the test seam (gcmc.pipeline.faults); nothing in real builds
    if task.is_rerun:
        from gcmc.pipeline.escalation import run_point_task

        return run_point_task(plan, task)
    if task.anchor:
        from gcmc.pipeline.anchor import run_anchor_task

        return run_anchor_task(plan, task)
    cfg = plan.config
    tp = plan.temperatures[task.t_index]
    model = pore_model(cfg, task.w_index, task.width_H_nm(cfg))
    limit = pore_limit(model, tp.temperature_K)
    n_p = len(tp.pressures_Pa)
    arrays: dict[str, np.ndarray] = {}
    flags: dict[str, list[str]] = {}
    seeds = task_seed(cfg, task)
    point_seeds = seeds.spawn(2 * n_p)
    started = task_clock()
    branches = BRANCHES if cfg.pressures.descending else BRANCHES[:1]
    positions = None
    dmax = None
    for b, branch in enumerate(branches):
        for name in POINT_FIELDS:
            arrays[f"{branch}/{name}"] = np.full(n_p, np.nan)
        flags[branch] = [""] * n_p
        order = range(n_p) if branch == "adsorption" else range(n_p - 1, -1, -1)
        states = [point_state(cfg, tp, k) for k in range(n_p)]
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
                arrays[f"{branch}/{name}"][k] = point_field(r, name)
            flags[branch][k] = "; ".join(r.flags)
    meta = {
        "t_index": task.t_index,
        "w_index": task.w_index,
        "temperature_K": tp.temperature_K,
        "width_H_nm": model.width_nm,
        "flags": flags,
        "host": socket.gethostname(),
    }
    arrays["henry_per_nm3_per_pa"] = np.array(limit.henry_per_nm3_per_pa)
    arrays["accessible"] = np.array(limit.accessible)
    return write_task(plan, task, arrays, meta, started)


def task_clock() -> tuple[float, float]:
    """The wall and CPU clocks at the start of a task (for :func:`write_task`)."""
    return time.perf_counter(), time.process_time()


def write_task(
    plan: BuildPlan,
    task: Task,
    arrays: dict[str, np.ndarray],
    meta: dict,
    started: tuple[float, float],
) -> Path:
    """Write a finished task of any kind (ladder, rerun, anchor): its arrays, its wall and
    CPU seconds since ``started`` (:func:`task_clock`), and its metadata (``meta`` with the
    fields every task file carries: the task's key, seconds, the seed's entropy and the
    task's spawn key), atomically."""
    seconds = time.perf_counter() - started[0]
    cpu_seconds = time.process_time() - started[1]
    meta = {
        **meta,
        "task": task.key,
        "seconds": seconds,
        "seed_entropy": int(plan.config.seed),
        "spawn_key": list(task.spawn_key()),
    }
    arrays["seconds"] = np.array(seconds)
    arrays["cpu_seconds"] = np.array(cpu_seconds)
    arrays["meta_json"] = np.frombuffer(json.dumps(meta, sort_keys=True).encode(), dtype=np.uint8)
    return finish_task(plan, task, arrays)


def finish_task(plan: BuildPlan, task: Task, arrays: dict[str, np.ndarray]) -> Path:
    """Write a task's arrays atomically (with their checksum) and clear its failure record."""
    path = task_path(plan, task)
    _atomic_savez(path, arrays)
    fail = failure_path(plan, task)
    if fail.exists():
        fail.unlink()
    return path


CHECKSUM_KEY = "sha256"


def _checksum(arrays: dict[str, np.ndarray]) -> np.ndarray:
    """SHA-256 over every array's name, dtype, shape and bytes, in name order."""
    import hashlib

    h = hashlib.sha256()
    for name in sorted(k for k in arrays if k != CHECKSUM_KEY):
        a = np.ascontiguousarray(arrays[name])
        h.update(f"{name}|{a.dtype.str}|{a.shape}|".encode())
        h.update(a.tobytes())
    return np.frombuffer(h.digest(), dtype=np.uint8)


class DamagedTask(ValueError):
    """A task file that cannot be read or whose checksum does not match."""


def _atomic_savez(path: Path, arrays: dict[str, np.ndarray]) -> None:
    arrays = dict(arrays)
    arrays[CHECKSUM_KEY] = _checksum(arrays)
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_write(path, "wb") as fh:
        np.savez(fh, **arrays)


def load_task(path: Path) -> tuple[dict[str, np.ndarray], dict]:
    """A task file's arrays and metadata; DamagedTask when it cannot be read or its checksum
    (when it has one) does not match."""
    try:
        with np.load(path) as z:
            arrays = {k: z[k] for k in z.files}
    except FileNotFoundError:
        raise
    except Exception as exc:  # noqa: BLE001 - zip, CRC, pickle or numpy format errors
        raise DamagedTask(f"{path}: unreadable task file ({type(exc).__name__}: {exc})") from None
    stored = arrays.pop(CHECKSUM_KEY, None)
    if stored is not None and not np.array_equal(stored, _checksum(arrays)):
        raise DamagedTask(f"{path}: checksum does not match its contents")
    try:
        meta = json.loads(arrays.pop("meta_json").tobytes().decode())
    except (KeyError, ValueError) as exc:
        raise DamagedTask(f"{path}: no readable metadata ({exc})") from None
    return arrays, meta


def verify_tasks(plan: BuildPlan, tasks: list[Task]) -> list[Task]:
    """The tasks whose files are damaged (removed, to be recomputed) or gone."""
    bad = []
    for t in tasks:
        p = task_path(plan, t)
        if not p.exists():
            bad.append(t)
            continue
        try:
            load_task(p)
        except DamagedTask:
            p.unlink(missing_ok=True)
            bad.append(t)
    return bad


def task_cpu_seconds(arrays: dict[str, np.ndarray]) -> float:
    """CPU seconds a task file records (its wall seconds for files from before CPU time was
    recorded)."""
    return float(arrays["cpu_seconds"] if "cpu_seconds" in arrays else arrays["seconds"])


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
            f"{task.width_H_nm(plan.config):g} nm) failed: "
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


def _worker_run(plan: BuildPlan, key: str) -> tuple[str, str, float, str]:
    # The parent's plan itself (pickled, a few kB, with every task): a worker does not re-read
    # the config (which may have been edited since the build started) nor redo the EOS states.
    task = next(t for t in plan.tasks if t.key == key)
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
            except Exception:  # noqa: BLE001 - a damaged file is recomputed after the round
                continue
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
