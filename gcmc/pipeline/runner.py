"""Running a build: a lock on the output, the log, the progress bar, and the three ways of
spreading tasks (in this process, a local process pool, or MPI ranks).

Scheduling: tasks go most expensive first (estimated, or learned from finished tasks), and
are handed out one at a time as workers become free: a process pool's queue, or under MPI a
shared counter that every rank increments atomically (MPI one-sided Fetch_and_op), so that
rank 0 works too and no rank waits for a master.
"""

from __future__ import annotations

import os
import socket
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

from gcmc.errors import InputError
from gcmc.pipeline.config import load_config
from gcmc.pipeline.tasks import (
    BuildPlan,
    Task,
    failure_path,
    learned_order,
    make_plan,
    pending_tasks,
    run_task_safely,
    task_path,
)

# --- MPI detection ---------------------------------------------------------------------------


def mpi_world_size() -> int:
    """Ranks of the MPI job this process belongs to (1 when not under mpiexec)."""
    for var in (
        "OMPI_COMM_WORLD_SIZE",
        "PMI_SIZE",
        "PMIX_SIZE",
        "MPI_LOCALNRANKS",
        "SLURM_STEP_NUM_TASKS",
    ):
        v = os.environ.get(var)
        if v and v.isdigit():
            return int(v)
    return 1


# --- lock --------------------------------------------------------------------------------------


class BuildLock:
    """An exclusive lock on a kernel's output (a file created with O_EXCL). A lock left by a
    process that no longer runs on this host is taken over; so is one left by an earlier run
    of the same SLURM job (a requeued job restarts on any node; SLURM starts the new run only
    after the old one has ended); any other is refused."""

    def __init__(self, path: Path):
        self.path = path
        self.held = False

    def acquire(self) -> None:
        """Take the build lock, or raise InputError naming the live owner."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        me = f"{socket.gethostname()} {os.getpid()}{_slurm_run()}\n"
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                if self._stale():
                    self.path.unlink(missing_ok=True)
                    continue
                owner = self.path.read_text().strip() if self.path.exists() else "?"
                raise InputError(
                    f"{self.path}: another build is writing this kernel "
                    f"(host, pid: {owner}); wait for it or remove the lock if it "
                    "is dead"
                ) from None
            with os.fdopen(fd, "w") as fh:
                fh.write(me)
            self.held = True
            return
        raise InputError(f"{self.path}: could not take the build lock")

    def _stale(self) -> bool:
        try:
            host, pid, *rest = self.path.read_text().split()
            int(pid)
        except (OSError, ValueError):
            # Unreadable or empty: either left half-written by a dead process, or just created
            # by a live one that has not written its line yet (O_EXCL create, then write).
            try:
                return time.time() - self.path.stat().st_mtime > 10.0
            except OSError:
                return True
        if rest and rest[0].startswith("slurm:") and _slurm_run().strip():
            job, _, restart = rest[0][6:].partition(".")
            me_job, _, me_restart = _slurm_run().strip()[6:].partition(".")
            if job == me_job and restart.isdigit() and int(restart) < int(me_restart):
                return True
        if host != socket.gethostname():
            return False
        try:
            os.kill(int(pid), 0)
        except ProcessLookupError:
            return True
        except PermissionError:
            return False
        return False

    def release(self) -> None:
        """Give the build lock back (remove the lock file)."""
        if self.held:
            self.path.unlink(missing_ok=True)
            self.held = False


def _slurm_run() -> str:
    """The lock's SLURM tag, ' slurm:JOB.RESTART' (RESTART counts requeues); '' outside."""
    job = os.environ.get("SLURM_JOB_ID", "")
    restart = os.environ.get("SLURM_RESTART_COUNT", "0")
    if not job.isdigit() or not restart.isdigit():
        return ""
    return f" slurm:{job}.{restart}"


class BuildLog:
    """The build's log file: one time-stamped line per event, thread-safe."""

    def __init__(self, path: Path):
        path.parent.mkdir(parents=True, exist_ok=True)
        self.path = path
        self._lock = threading.Lock()

    def write(self, line: str) -> None:
        """Append one time-stamped line."""
        stamp = time.strftime("%Y-%m-%d %H:%M:%S")
        with self._lock, open(self.path, "a") as fh:
            fh.write(f"{stamp} {line}\n")


@dataclass
class RunReport:
    """What a run of tasks did: task keys done and failed, tasks reused, seconds."""

    done: list[str] = field(default_factory=list)
    failed: list[str] = field(default_factory=list)
    skipped: int = 0
    seconds: float = 0.0


def _points_per_task(plan: BuildPlan) -> int:
    return len(plan.config.pressures.values) * (2 if plan.config.pressures.descending else 1)


def start_local_pool(workers: int):
    """A process pool of ``workers`` spawned workers, started now: each imports the package
    and loads the compiled engine while the parent goes on (the EOS states of the plan take
    it about as long), instead of after the plan is ready."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    from gcmc.pipeline.tasks import _worker_init, _worker_ping

    pool = ProcessPoolExecutor(
        max_workers=workers, mp_context=mp.get_context("spawn"), initializer=_worker_init
    )
    for _ in range(workers):
        pool.submit(_worker_ping)
    return pool


def run_tasks_local(plan: BuildPlan, workers: int, log: BuildLog, bar, pool=None) -> RunReport:
    """Run the pending tasks in this process (workers == 1) or a process pool (``pool``, or
    one started here)."""
    report = RunReport()
    todo = learned_order(plan, pending_tasks(plan))
    report.skipped = len(plan.tasks) - len(todo)
    per = _points_per_task(plan)
    t0 = time.perf_counter()

    def record(key: str, status: str, seconds: float, msg: str) -> None:
        (report.done if status == "done" else report.failed).append(key)
        log.write(f"task {key} {status} in {seconds:.2f} s {msg}".rstrip())
        if bar is not None:
            bar.update(1 if ("_b" in key or "_eq" in key) else per)  # a rerun, an anchor: one
            if status != "done":
                bar.write(msg)

    if pool is None and (workers <= 1 or len(todo) <= 1):
        from gcmc.sampling.box import warm_up

        warm_up()
        for task in todo:
            status, sec, msg = run_task_safely(plan, task)
            record(task.key, status, sec, msg)
    else:
        from concurrent.futures import as_completed

        from gcmc.pipeline.tasks import _worker_run

        own = pool is None  # a pool handed in stays open for the caller's next round
        if own:
            pool = start_local_pool(min(workers, len(todo)))
        try:
            futures = [pool.submit(_worker_run, plan, t.key) for t in todo]
            for fut in as_completed(futures):
                key, status, sec, msg = fut.result()
                record(key, status, sec, msg)
        finally:
            if own:
                pool.shutdown(wait=True, cancel_futures=True)
    report.seconds = time.perf_counter() - t0
    return report


def run_tasks_mpi(plan: BuildPlan, log: BuildLog, bar) -> RunReport:
    """All ranks take tasks from a shared atomic counter; rank 0 shows progress by watching
    the task files appear (every finished task is on disk before it is counted)."""
    from mpi4py import MPI

    comm = MPI.COMM_WORLD
    rank = comm.Get_rank()
    todo = learned_order(plan, pending_tasks(plan)) if rank == 0 else None
    keys = comm.bcast([t.key for t in todo] if rank == 0 else None, root=0)
    by_key = {t.key: t for t in plan.tasks}
    order: list[Task] = [by_key[k] for k in keys]
    report = RunReport(skipped=len(plan.tasks) - len(order))
    import numpy as np

    itemsize = MPI.INT64_T.Get_size()
    win = MPI.Win.Allocate(itemsize if rank == 0 else 0, itemsize, comm=comm)
    if rank == 0:
        buf = np.frombuffer(win.tomemory(), dtype=np.int64)
        buf[0] = 0
    comm.Barrier()
    # One passive-target epoch for the whole run, and Fetch_and_op + Flush per task: an
    # exclusive Lock/Unlock per fetch needs the target (rank 0) to enter the MPI library to
    # grant the lock, so under MPICH every other rank waited for rank 0's current task to end
    # before it got its next one. Fetch_and_op is atomic by itself and needs no lock.
    win.Lock_all()
    stop = threading.Event()
    watcher = None
    if rank == 0 and bar is not None:
        per = _points_per_task(plan)

        def watch() -> None:
            seen: set[str] = set()
            while not stop.is_set():
                for t in order:
                    if t.key not in seen and (
                        task_path(plan, t).exists() or failure_path(plan, t).exists()
                    ):
                        seen.add(t.key)
                        bar.update(1 if t.is_single else per)
                stop.wait(0.5)

        watcher = threading.Thread(target=watch, daemon=True)
        watcher.start()
    from gcmc.sampling.box import warm_up

    warm_up()
    t0 = time.perf_counter()
    one = np.array([1], dtype=np.int64)
    got = np.zeros(1, dtype=np.int64)
    while True:
        win.Fetch_and_op(one, got, 0, 0, MPI.SUM)
        win.Flush(0)
        i = int(got[0])
        if i >= len(order):
            break
        task = order[i]
        status, sec, msg = run_task_safely(plan, task)
        (report.done if status == "done" else report.failed).append(task.key)
        log.write(f"rank {rank} task {task.key} {status} in {sec:.2f} s {msg}".rstrip())
    win.Unlock_all()
    comm.Barrier()
    win.Free()
    stop.set()
    if watcher is not None:
        watcher.join()
    done = comm.gather(report.done, root=0)
    failed = comm.gather(report.failed, root=0)
    if rank == 0:
        report.done = [k for d in done for k in d]
        report.failed = [k for f in failed for k in f]
    report.seconds = time.perf_counter() - t0
    return report


def load_plan(config_path: str | Path) -> BuildPlan:
    """Read a config file and plan its build (EOS states, tasks, seeds)."""
    return make_plan(load_config(config_path))


def progress_bar(total: int, initial: int, enabled: bool):
    """A tqdm progress bar over the build's points, on stderr (disabled unless ``enabled``)."""
    from tqdm import tqdm

    return tqdm(
        total=total,
        initial=initial,
        unit="point",
        desc="build",
        file=sys.stderr,
        disable=not enabled,
        smoothing=0.1,
        dynamic_ncols=True,
    )
