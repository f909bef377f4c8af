"""`gcmc build CONFIG`: simulate the grid of a run config and write a kernel library."""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections import Counter

import numpy as np

HELP = """Build a kernel from a TOML run config: for every temperature and pore width, run a
pressure ladder of GCMC state points (each starting from the previous equilibrated
configuration), fit each isotherm to a correlating form, and write a versioned HDF5 kernel
library into the config's output folder. Finished tasks are kept on disk: rerun the same
command after an interruption and the build continues where it stopped. Under
`mpiexec -n K gcmc build CONFIG` the tasks are spread over K ranks."""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "build",
        help="build a kernel from a run config",
        description=HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("config", help="run config (TOML), e.g. configs/quickstart.toml")
    p.add_argument(
        "--workers",
        type=int,
        default=0,
        help="local worker processes (default: every core; ignored under MPI)",
    )
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.add_argument(
        "--check-only",
        action="store_true",
        help="validate the config and print the plan, simulate nothing",
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from gcmc.errors import InputError
    from gcmc.pipeline.runner import mpi_world_size

    if args.workers < 0:
        raise InputError(f"--workers: must be >= 0, got {args.workers}")
    size = mpi_world_size()
    rank = 0
    if size > 1:
        from mpi4py import MPI

        # the launcher's environment is a hint; the communicator decides (a process started
        # by srun without an MPI plugin is a singleton and builds with a local pool instead)
        size = MPI.COMM_WORLD.Get_size()
        rank = MPI.COMM_WORLD.Get_rank()
    try:
        return _run(args, size, rank)
    except InputError as exc:
        if size > 1:
            print(f"gcmc build: error: {exc}", file=sys.stderr)
            from mpi4py import MPI

            MPI.COMM_WORLD.Abort(2)
        raise


def _run(args: argparse.Namespace, size: int, rank: int) -> int:
    from gcmc.kernel.writer import next_version
    from gcmc.pipeline.config import load_config
    from gcmc.pipeline.runner import start_local_pool
    from gcmc.pipeline.tasks import make_plan

    t_start = time.perf_counter()
    cfg = load_config(args.config)  # validates every field before anything is written
    say = print if rank == 0 else (lambda *a, **k: None)
    version, existing = next_version(cfg.output, cfg.name, cfg.config_hash)
    if existing is not None:
        say(f"kernel up to date: {existing} (same config; nothing to do)")
        return 0
    workers = args.workers or os.cpu_count() or 1
    n_tasks = len(cfg.temperatures_K) * len(cfg.widths_H_nm)
    pool = None
    if size == 1 and not args.check_only and min(workers, n_tasks) > 1:
        # the workers start (imports, compiled engine) while the EOS states are computed
        pool = start_local_pool(min(workers, n_tasks))
    try:
        plan = make_plan(cfg)  # EOS states: may still refuse a state (one line, exit 2)
        return _build(args, cfg, plan, version, workers, pool, size, rank, t_start)
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)


def _build(args, cfg, plan, version, workers, pool, size, rank, t_start) -> int:  # noqa: ANN001, PLR0913
    from gcmc.kernel.writer import write_kernel
    from gcmc.pipeline.assemble import assemble_kernel
    from gcmc.pipeline.runner import (
        BuildLock,
        BuildLog,
        progress_bar,
        run_tasks_local,
        run_tasks_mpi,
    )

    say = print if rank == 0 else (lambda *a, **k: None)
    say(
        f"{cfg.name} v{version}: {cfg.probe.name}, {len(cfg.temperatures_K)} temperature(s) x "
        f"{len(cfg.widths_H_nm)} widths x {len(cfg.pressures.values)} pressures"
        f"{' (+ desorption)' if cfg.pressures.descending else ''} = {plan.n_points} points in "
        f"{len(plan.tasks)} tasks; EOS {cfg.eos}; "
        + (f"{size} MPI ranks" if size > 1 else f"{workers} worker(s)")
    )
    if args.check_only:
        return 0
    lock = BuildLock(cfg.output / f"{cfg.name}.lock")
    log = BuildLog(cfg.output / f"{cfg.name}.log")
    if rank == 0:
        lock.acquire()
    try:
        if size > 1:
            from mpi4py import MPI

            MPI.COMM_WORLD.Barrier()
        from gcmc.pipeline.tasks import pending_tasks

        per = plan.n_points // max(len(plan.tasks), 1)
        done_before = len(plan.tasks) - len(pending_tasks(plan))
        if rank == 0:
            log.write(
                f"build {cfg.name} v{version} config {cfg.config_hash[:16]} "
                f"({done_before}/{len(plan.tasks)} tasks already on disk)"
            )
        bar = progress_bar(
            plan.n_points, done_before * per, enabled=(rank == 0 and not args.no_progress)
        )
        with bar:
            if size > 1:
                report = run_tasks_mpi(plan, log, bar if rank == 0 else None)
            else:
                report = run_tasks_local(plan, workers, log, bar, pool=pool)
        if rank != 0:
            return 0
        missing_tasks = pending_tasks(plan)
        missing = [t.key for t in missing_tasks]
        if missing:
            log.write(f"build incomplete: {len(missing)} task(s) missing: {', '.join(missing)}")
            print(
                f"gcmc build: {len(missing)} of {len(plan.tasks)} task(s) failed or missing "
                f"({', '.join(missing[:8])}{'...' if len(missing) > 8 else ''}); see "
                f"{log.path}. Rerun the same command to retry them.",
                file=sys.stderr,
            )
            for t in missing_tasks[:8]:  # every rank's failures, with their coordinates
                print(f"  {_failure_line(plan, t)}", file=sys.stderr)
            return 1
        data, fits = assemble_kernel(plan, version)
        path = write_kernel(data, cfg.output)
        log.write(f"kernel written: {path}")
        _summary(plan, data, fits, report, path, time.perf_counter() - t_start)
        return 0
    finally:
        if rank == 0:
            lock.release()


def _failure_line(plan, task) -> str:  # noqa: ANN001
    import json

    from gcmc.pipeline.tasks import failure_path

    try:
        return json.loads(failure_path(plan, task).read_text())["error"]
    except (OSError, ValueError, KeyError):
        t = plan.temperatures[task.t_index].temperature_K
        h = plan.config.widths_H_nm[task.w_index]
        return f"task {task.key} (T = {t:g} K, H = {h:g} nm): not run"


def _summary(plan, data, fits, report, path, seconds) -> None:  # noqa: ANN001
    from gcmc.cli.kernel import _flag_tokens

    pts = data.points["adsorption"]
    n = pts["density_per_nm3"]
    e = pts["density_per_nm3_stderr"]
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.where(n > 0, e / n, 0.0)
    worst = np.unravel_index(np.nanargmax(rel), rel.shape) if np.isfinite(rel).any() else None
    unconverged = int(np.sum(pts["converged"] == 0))
    flagged = sum(1 for f in data.flags["adsorption"].ravel() if f)
    forms = Counter(f.form for f in fits)
    chi = [(f.reduced_chi2, f) for f in fits if np.isfinite(f.reduced_chi2)]
    worst_fit = max(chi, key=lambda x: x[0])[1] if chi else None
    rows = [
        ("kernel", str(path)),
        ("points", f"{plan.n_points} ({report.skipped} task(s) reused from disk)"),
        ("failures", str(len(report.failed))),
        ("unconverged / flagged", f"{unconverged} / {flagged}"),
    ]
    kinds = Counter()
    for branch_flags in data.flags.values():
        kinds += _flag_tokens(branch_flags)
    if kinds:  # what the flags say, all branches (meanings: kernels/README.md)
        rows.append(("flags", ", ".join(f"{k} x{v}" for k, v in kinds.most_common())))
    if worst is not None:
        t, w, k = worst
        rows.append(
            (
                "worst relative error",
                f"{rel[worst]:.3g} at T = {data.temperatures_K[t]:g} K, H = "
                f"{data.widths_H_nm[w]:g} nm, p = {data.pressures_Pa[t, k]:.4g} Pa",
            )
        )
    if worst_fit is not None:
        rows.append(
            (
                "worst fit",
                f"reduced chi2 = {worst_fit.reduced_chi2:.3g} ({worst_fit.form},"
                f" T = {data.temperatures_K[worst_fit.t_index]:g} K, H = "
                f"{data.widths_H_nm[worst_fit.w_index]:g} nm)",
            )
        )
    rows.append(("forms used", ", ".join(f"{k} x{v}" for k, v in forms.most_common())))
    rows.append(("CPU time in tasks", f"{float(np.sum(data.task_seconds)):.1f} s"))
    rows.append(("wall time", f"{seconds:.1f} s"))
    width = max(len(r[0]) for r in rows)
    print("\n".join(f"  {k:<{width}}  {v}" for k, v in rows))
