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
        if rank != 0:
            result.status = "worker"
            return
        result.missing = pending_tasks(plan)
        if result.missing:
            keys = ", ".join(t.key for t in result.missing)
            log.write(f"build incomplete: {len(result.missing)} task(s) missing: {keys}")
            result.status = "incomplete"
            return
        result.data, result.fits = assemble_kernel(plan, result.version)
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
        h = plan.config.widths_H_nm[task.w_index]
        return f"task {task.key} (T = {t:g} K, H = {h:g} nm): not run"
