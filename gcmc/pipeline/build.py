"""Building a kernel from a run config, as a function: plan, run the tasks (in this process,
a local process pool or MPI ranks), assemble, fit and write the kernel file.

:func:`build_kernel` prints nothing; the command line (``gcmc build``) and the Python API
(:func:`gcmc.api.build_kernel`) present its :class:`BuildResult`. Progress is a tqdm bar,
shown only when asked for.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

from gcmc.errors import InputError

if TYPE_CHECKING:
    from gcmc.kernel.data import FitRecord, KernelData
    from gcmc.pipeline.config import RunConfig
    from gcmc.pipeline.runner import RunReport
    from gcmc.pipeline.tasks import BuildPlan, Task


@dataclass
class BuildResult:
    """What a build did.

    Attributes
    ----------
    status : str
        ``"written"`` (a new kernel file), ``"up_to_date"`` (a kernel of the same config
        exists; nothing was run), ``"planned"`` (``plan_only``: nothing was run),
        ``"incomplete"`` (tasks failed or are missing; rerun to retry them) or ``"worker"``
        (an MPI rank other than 0, which holds no result).
    config : RunConfig
        The validated run config.
    version : int
        The kernel version this build writes (or wrote).
    path : Path or None
        The kernel file (``written``, ``up_to_date``), else None.
    plan : BuildPlan or None
        The plan (EOS states, tasks, seeds); None when the kernel was up to date.
    data : KernelData or None
        The assembled kernel (``written`` only).
    fits : list of FitRecord
        One fit per (temperature, width, branch) (``written`` only).
    report : RunReport or None
        Tasks run, reused from disk and failed in this run.
    missing : list of Task
        Tasks without a result after the run (``incomplete`` only).
    wall_seconds : float
        Wall time of the whole call.
    workers : int
        Local worker processes (1 under MPI: one per rank).
    ranks : int
        MPI ranks (1 without MPI).
    refinement : dict or None
        What the refinement rounds did (``written`` with a ``[target]`` that refines): rounds,
        widths added where and why, points rerun with what, what still fails and why, the
        CPU seconds spent and the check's verdict at the end; also in the kernel's
        provenance under ``refinement``.
    """

    status: str
    config: RunConfig
    version: int
    path: Path | None = None
    plan: BuildPlan | None = None
    data: KernelData | None = None
    fits: list[FitRecord] = field(default_factory=list)
    report: RunReport | None = None
    missing: list[Task] = field(default_factory=list)
    wall_seconds: float = 0.0
    workers: int = 1
    ranks: int = 1
    refinement: dict | None = None
    #: the anchor paths of the equilibrium branch (``written`` with an [equilibrium] table):
    #: tasks, points and CPU seconds (from their task files)
    equilibrium: dict | None = None

    @property
    def ok(self) -> bool:
        """True when the kernel file exists for this config (written now or before)."""
        return self.status in ("written", "up_to_date")


def mpi_rank_and_size() -> tuple[int, int]:
    """This process's MPI rank and the communicator's size ((0, 1) when not under MPI).

    The launcher's environment is a hint; the communicator decides (a process started by
    srun without an MPI plugin is a singleton and builds with a local pool instead).
    """
    from gcmc.pipeline.runner import mpi_world_size

    if mpi_world_size() <= 1:
        return 0, 1
    from mpi4py import MPI

    return MPI.COMM_WORLD.Get_rank(), MPI.COMM_WORLD.Get_size()


def build_kernel(
    config: str | Path | RunConfig,
    *,
    workers: int = 0,
    progress: bool = False,
    plan_only: bool = False,
    on_plan=None,
) -> BuildResult:
    """Build the kernel of a run config; resume from the tasks already on disk.

    Parameters
    ----------
    config : str, Path or RunConfig
        A run config file (TOML), validated before anything is written, or a loaded config.
    workers : int, optional
        Local worker processes; 0 (default) uses every core. Ignored under MPI, where every
        rank is one worker.
    progress : bool, optional
        Show a progress bar (on rank 0). Default False.
    plan_only : bool, optional
        Validate and plan (EOS states, tasks), simulate nothing. Default False.
    on_plan : callable, optional
        Called as ``on_plan(result)`` on rank 0 once the plan exists, before any simulation
        (the command line prints its one-line plan there).

    Returns
    -------
    BuildResult
        See :class:`BuildResult`; ``status`` says what happened.

    Raises
    ------
    InputError
        A bad config field, a state the equation of state refuses, or another build holding
        the output's lock.

    Examples
    --------
    >>> from gcmc.pipeline.build import build_kernel
    >>> result = build_kernel("configs/quickstart.toml", workers=2)  # doctest: +SKIP
    >>> result.status, result.path  # doctest: +SKIP
    ('written', PosixPath('.../quickstart-methane-298K.v1.h5'))
    """
    from gcmc.kernel.writer import next_version
    from gcmc.pipeline.config import RunConfig, load_config
    from gcmc.pipeline.runner import start_local_pool
    from gcmc.pipeline.tasks import make_plan

    if workers < 0:
        raise InputError(f"workers: must be >= 0, got {workers}")
    t_start = time.perf_counter()
    rank, size = mpi_rank_and_size()
    cfg = config if isinstance(config, RunConfig) else load_config(config)
    version, existing = next_version(cfg.output, cfg.name, cfg.config_hash)
    n_workers = 1 if size > 1 else (workers or os.cpu_count() or 1)
    result = BuildResult(
        status="up_to_date", config=cfg, version=version, workers=n_workers, ranks=size
    )
    if existing is not None:
        result.path = Path(existing)
        result.wall_seconds = time.perf_counter() - t_start
        return result
    n_tasks = len(cfg.temperatures_K) * len(cfg.widths_H_nm)
    pool = None
    if size == 1 and not plan_only and min(n_workers, n_tasks) > 1:
        # the workers start (imports, compiled engine) while the EOS states are computed
        pool = start_local_pool(min(n_workers, n_tasks))
    try:
        result.plan = make_plan(cfg)  # EOS states: may still refuse a state
        result.status = "planned"
        if on_plan is not None and rank == 0:
            on_plan(result)
        if not plan_only:
            _run_plan(result, pool, rank, size, progress)
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
    result.wall_seconds = time.perf_counter() - t_start
    return result


def _run_plan(result: BuildResult, pool, rank: int, size: int, progress: bool) -> None:
    """Run the plan's pending tasks, then (rank 0) assemble and write the kernel."""
    from gcmc.kernel.writer import write_kernel
    from gcmc.pipeline.assemble import assemble_kernel
    from gcmc.pipeline.runner import (
        BuildLock,
        BuildLog,
        progress_bar,
        run_tasks_local,
        run_tasks_mpi,
    )
    from gcmc.pipeline.tasks import pending_tasks

    cfg, plan = result.config, result.plan
    lock = BuildLock(cfg.output / f"{cfg.name}.lock")
    log = BuildLog(cfg.output / f"{cfg.name}.log")
    if rank == 0:
        lock.acquire()
    try:
        if size > 1:
            from mpi4py import MPI

            MPI.COMM_WORLD.Barrier()
        per = plan.n_points // max(len(plan.tasks), 1)
        done_before = len(plan.tasks) - len(pending_tasks(plan))
        if rank == 0:
            log.write(
                f"build {cfg.name} v{result.version} config {cfg.config_hash[:16]} "
                f"({done_before}/{len(plan.tasks)} tasks already on disk)"
            )
        bar = progress_bar(plan.n_points, done_before * per, enabled=(rank == 0 and progress))
        with bar:
            if size > 1:
                result.report = run_tasks_mpi(plan, log, bar if rank == 0 else None)
            else:
                result.report = run_tasks_local(plan, result.workers, log, bar, pool=pool)
        if rank == 0:
            result.missing = pending_tasks(plan)
        layout, extra = None, None
        if cfg.refining:
            missing = _bcast(size, result.missing)
            if not missing:
                layout, extra = _refine_rounds(result, pool, rank, size, progress, log)
        anchors: list = []
        if cfg.equilibrium is not None and not _bcast(size, bool(result.missing)):
            anchors = _anchor_round(result, pool, rank, size, progress, log, layout)
        if rank != 0:
            result.status = "worker"
            return
        if result.missing:
            keys = ", ".join(t.key for t in result.missing)
            log.write(f"build incomplete: {len(result.missing)} task(s) missing: {keys}")
            result.status = "incomplete"
            return
        if layout is None:
            from gcmc.pipeline.assemble import grid_layout

            layout = grid_layout(plan)
        _repair(result, pool, rank, 1, progress, log, layout.tasks() + anchors)
        if result.missing:
            log.write(f"build incomplete: {len(result.missing)} task(s) missing")
            result.status = "incomplete"
            return
        result.data, result.fits = assemble_kernel(plan, result.version, layout, extra)
        if cfg.equilibrium is not None:
            from gcmc.pipeline.anchor import anchor_cost, equilibrium_branch

            result.data.equilibrium = equilibrium_branch(plan, result.data, layout, anchors)
            result.data.provenance["equilibrium"] = {
                **cfg.equilibrium.to_dict(),
                "hot_temperature_K_used": cfg.hot_temperature_K,
                "anchor_tasks": [a.key for a in anchors],
                "path": "gcmc.pipeline.anchor: hot isotherm from the Henry limit, cooling at "
                "fixed ln z, liquid isotherm at the kernel temperature down to the top point",
            }
            result.equilibrium = anchor_cost(plan, anchors)
        if extra is not None:
            extra["refinement"]["check"] = _final_check(result.data, cfg)
            result.refinement = extra["refinement"]
        result.path = write_kernel(result.data, cfg.output)
        log.write(f"kernel written: {result.path}")
        result.status = "written"
    finally:
        if rank == 0:
            lock.release()


def failure_line(plan: BuildPlan, task: Task) -> str:
    """One line on why a task has no result: its recorded error, or 'not run'."""
    import json

    from gcmc.pipeline.tasks import failure_path

    try:
        return json.loads(failure_path(plan, task).read_text())["error"]
    except (OSError, ValueError, KeyError):
        t = plan.temperatures[task.t_index].temperature_K
        h = task.width_H_nm(plan.config)
        return f"task {task.key} (T = {t:g} K, H = {h:g} nm): not run"


# --- equilibrium anchors -------------------------------------------------------------------


def _anchor_round(result: BuildResult, pool, rank: int, size: int, progress: bool, log, layout):  # noqa: ANN001, ANN202, E501
    """After the first pass and the refinement rounds: plan (rank 0, from the task files on
    disk, so a resumed build plans the same) and run (every worker or rank) the anchor path
    of every pore with a hysteresis loop (gcmc.pipeline.anchor). Returns the anchor tasks on
    rank 0 ([] elsewhere); a missing one makes the build incomplete."""
    from gcmc.pipeline.anchor import plan_anchor_tasks
    from gcmc.pipeline.assemble import assemble_kernel, grid_layout

    plan = result.plan
    if rank == 0 and layout is None:
        layout = grid_layout(plan)
    _repair(result, pool, rank, size, progress, log, layout.tasks() if rank == 0 else None)
    if _bcast(size, bool(result.missing)):
        return []
    todo = None
    if rank == 0:
        data, _ = assemble_kernel(plan, result.version, layout)
        todo = plan_anchor_tasks(plan, data, layout)
        log.write(f"equilibrium: {len(todo)} pore(s) with a hysteresis loop get an anchor path")
    missing = _run_round(result, pool, rank, size, progress, log, todo, "equilibrium anchors")
    if rank == 0 and missing:
        result.missing = list(missing)
    return todo if rank == 0 else []


# --- refinement rounds ---------------------------------------------------------------------


def _bcast(size: int, value):  # noqa: ANN001, ANN202
    """Rank 0's value on every rank (the value itself without MPI)."""
    if size == 1:
        return value
    from mpi4py import MPI

    return MPI.COMM_WORLD.bcast(value, root=0)


def _run_round(
    result: BuildResult, pool, rank: int, size: int, progress: bool, log, tasks, label: str
):  # noqa: ANN001, ANN202, E501
    """Run ``tasks`` (rank 0's list) on every worker or rank; rank 0 returns the missing ones."""
    from dataclasses import replace

    from gcmc.pipeline.runner import progress_bar, run_tasks_local, run_tasks_mpi
    from gcmc.pipeline.tasks import pending_tasks

    tasks = _bcast(size, tasks)
    if not tasks:
        return []
    sub = replace(result.plan, tasks=list(tasks))
    per = len(result.config.pressures.values) * (2 if result.config.pressures.descending else 1)
    total = sum(1 if t.is_single else per for t in tasks)  # an anchor path counts as one
    if rank == 0:
        log.write(f"{label}: {len(tasks)} task(s)")
    bar = progress_bar(total, 0, enabled=(rank == 0 and progress))
    bar.set_description(label)
    with bar:
        if size > 1:
            run_tasks_mpi(sub, log, bar if rank == 0 else None)
        else:
            run_tasks_local(sub, result.workers, log, bar, pool=pool)
    return pending_tasks(sub) if rank == 0 else []


def _repair(result: BuildResult, pool, rank: int, size: int, progress: bool, log, tasks) -> None:  # noqa: ANN001, E501
    """Verify the task files of ``tasks`` (checksums); recompute damaged ones now. Their
    random streams depend only on their coordinates, so the recomputed file is the same."""
    from gcmc.pipeline.tasks import verify_tasks

    for _ in range(2):
        damaged = verify_tasks(result.plan, tasks) if rank == 0 else None
        if rank == 0 and damaged:
            log.write(
                "damaged or missing task file(s) recomputed: " + ", ".join(t.key for t in damaged)
            )
        if not _bcast(size, bool(damaged)):
            return
        missing = _run_round(result, pool, rank, size, progress, log, damaged, "repair")
        if rank == 0 and missing:
            result.missing = list(missing)
        if _bcast(size, bool(result.missing)):  # every rank stops together
            return


def _refine_rounds(result: BuildResult, pool, rank: int, size: int, progress: bool, log):  # noqa: ANN001, ANN202
    """Refinement rounds after the first pass (module gcmc.pipeline.refine); rank 0 plans
    each round from the task files on disk, every rank runs it. Returns (layout, provenance
    additions) on rank 0."""
    from gcmc.pipeline.assemble import assemble_kernel, grid_layout
    from gcmc.pipeline.escalation import step
    from gcmc.pipeline.refine import apply_round, plan_round, round_tasks
    from gcmc.pipeline.tasks import load_task, task_cpu_seconds, task_path

    cfg, plan = result.config, result.plan
    target = cfg.target
    nt = len(plan.temperatures)
    layout = grid_layout(plan)
    history = list(plan.tasks)  # every task of every round, in order
    rounds: list[dict] = []
    stop, open_lines = "", []
    costs: dict[str, float] = {}
    ratio: dict[str, float] = {}  # CPU / wall seconds of each task file
    r = 0
    while True:
        r += 1
        _repair(result, pool, rank, size, progress, log, history)
        if _bcast(size, bool(result.missing)):
            return layout, None
        todo = None
        if rank == 0:
            for t in history:
                if t.key not in costs:
                    arrays, _ = load_task(task_path(plan, t))
                    costs[t.key] = task_cpu_seconds(arrays)
                    wall = float(arrays["seconds"])
                    ratio[t.key] = min(costs[t.key] / wall, 1.0) if wall > 0 else 1.0
            spent = float(sum(costs[t.key] for t in history))
            data, _ = assemble_kernel(plan, result.version, layout)
            index = {lad.width_key: j for j, lad in enumerate(layout.ladders[0])}
            point_spent: dict = {}
            for t in history:
                if t.is_rerun:
                    key = (t.t_index, index[t.ladder().width_key], t.branch, t.point)
                    point_spent[key] = point_spent.get(key, 0.0) + costs[t.key]
            rp = plan_round(data, layout, target, costs, spent, point_spent, ratio)
            open_lines = [f.line() for f in rp.findings if f.action not in ("rerun", "widths")]
            open_lines += [f"not run (budget): {c}" for c in rp.cut_by_budget]
            if r > target.max_rounds:
                stop = f"max_rounds = {target.max_rounds} reached"
                open_lines = [f.open_line("max_rounds") for f in rp.findings]
            elif spent >= target.cpu_seconds:
                stop = f"budget spent ({spent:.0f} of {target.cpu_seconds:.0f} CPU-s)"
                open_lines = [f.open_line("budget") for f in rp.findings]
            elif rp.empty:
                if not rp.findings:
                    stop = "target met"
                elif rp.cut_by_budget:
                    stop = (
                        f"budget: the next tasks do not fit ({spent:.0f} of "
                        f"{target.cpu_seconds:.0f} CPU-s spent)"
                    )
                else:
                    stop = "nothing left the build can act on"
            else:
                todo = round_tasks(rp, nt)
                rounds.append(
                    {
                        "round": r,
                        "cpu_seconds_before": spent,
                        "estimated_cpu_seconds": rp.estimated_cpu_seconds,
                        "widths_added": [{"H_nm": h, "why": why} for h, why in rp.widths],
                        "reruns": [
                            {
                                "task": t.key,
                                "method": step(t.step).method,
                                "effort": step(t.step).effort,
                                "step": t.step,
                                "why": why,
                            }
                            for t, _, why in rp.reruns
                        ],
                        "cut_by_budget": list(rp.cut_by_budget),
                    }
                )
                log.write(
                    f"round {r}: {len(rp.widths)} width(s) added, {len(rp.reruns)} point(s) "
                    f"rerun ({spent:.0f} CPU-s spent so far)"
                )
        todo = _bcast(size, todo)
        if todo is None:
            break
        missing = _run_round(result, pool, rank, size, progress, log, todo, f"round {r}")
        if rank == 0 and missing:
            result.missing = list(missing)
        if _bcast(size, bool(result.missing)):
            return layout, None
        if rank == 0:
            history += todo
            layout = apply_round(layout, rp, nt)
    if rank != 0:
        return None, None
    spent = float(sum(costs[t.key] for t in history))
    log.write(f"refinement stopped: {stop}")
    refinement = {
        "rounds": rounds,
        "stop": stop,
        "still_failing": open_lines,
        "widths_initial_H_nm": list(cfg.widths_H_nm),
        "widths_final_H_nm": list(layout.widths_H_nm),
        "cpu_seconds": spent,
        "budget_cpu_seconds": target.cpu_seconds,
        "points_rerun": {
            f"{t.width_key} {('adsorption', 'desorption')[b]} p{k}": {
                "H_nm": layout.widths_H_nm[j],
                "step": t.step,
                "method": step(t.step).method,
                "effort": step(t.step).effort,
                **({"cpu_budget_s": t.cpu_budget_s} if step(t.step).point_method else {}),
            }
            for (ti, j, b, k), t in sorted(layout.overrides.items())
        },
        "escalation": "point reruns: cold start at the step's method and effort "
        "(gcmc.pipeline.escalation.STEPS), then for dense subcritical points only the "
        "certificate of a filled point (gcmc.pipeline.escalation.CERTIFIED, "
        "'certified tempering'); every other point: the config's ladder",
    }
    return layout, {"refinement": refinement}


def _final_check(data, cfg) -> dict:  # noqa: ANN001
    """The quality check of the finished kernel against its target: verdict per criterion."""
    from gcmc.quality.criteria import run_checks
    from gcmc.quality.target import check_settings

    try:
        rep = run_checks(data, check_settings(cfg.target))
    except InputError as exc:  # a kernel the check cannot judge (e.g. no resolved width)
        return {"verdict": "not judged", "criteria": {}, "measured": {"error": str(exc)}}
    return {
        "verdict": rep.verdict,
        "criteria": {c.key: c.verdict for c in rep.criteria},
        "measured": {c.key: c.measured for c in rep.criteria if c.verdict in ("warn", "fail")},
    }
