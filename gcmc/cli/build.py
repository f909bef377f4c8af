"""`gcmc build CONFIG`: simulate the grid of a run config and write a kernel library."""

from __future__ import annotations

import argparse
import sys
from collections import Counter

import numpy as np

from gcmc.cli.common import DeprecatedAlias

HELP = """Build a kernel from a TOML run config: for every temperature and pore width, run a
pressure ladder of GCMC state points (each starting from the previous equilibrated
configuration), fit each isotherm to a correlating form, and write a versioned HDF5 kernel
library into the config's output folder. Finished tasks are kept on disk: rerun the same
command after an interruption and the build continues where it stopped. Under
`mpiexec -n K gcmc build CONFIG` the tasks are spread over K ranks."""


def register(sub: argparse._SubParsersAction) -> None:
    """Register the ``build`` subcommand."""
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
        "--plan-only",
        action="store_true",
        help="validate the config and print the plan, simulate nothing",
    )
    p.add_argument(
        "--check-only", dest="plan_only", action=DeprecatedAlias, nargs=0, new="--plan-only"
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Run ``gcmc build``: build (or resume) a kernel and print its summary; the exit code."""
    from gcmc.errors import InputError
    from gcmc.pipeline.build import build_kernel, mpi_rank_and_size

    if args.workers < 0:
        raise InputError(f"--workers: must be >= 0, got {args.workers}")
    rank, size = mpi_rank_and_size()
    try:
        result = build_kernel(
            args.config,
            workers=args.workers,
            progress=not args.no_progress,
            plan_only=args.plan_only,
            on_plan=_print_plan,
        )
    except InputError as exc:
        if size > 1:
            print(f"gcmc build: error: {exc}", file=sys.stderr)
            from mpi4py import MPI

            MPI.COMM_WORLD.Abort(2)
        raise
    if rank != 0:
        return 0
    if result.status == "up_to_date":
        print(f"kernel up to date: {result.path} (same config; nothing to do)")
        return 0
    if result.status == "incomplete":
        _print_incomplete(result)
        return 1
    if result.status == "written":
        _summary(result)
    return 0


def _print_plan(result) -> None:
    cfg, plan = result.config, result.plan
    print(
        f"{cfg.name} v{result.version}: {cfg.probe.name}, {len(cfg.temperatures_K)} "
        f"temperature(s) x {len(cfg.widths_H_nm)} widths x {len(cfg.pressures.values)} pressures"
        f"{' (+ desorption)' if cfg.pressures.descending else ''} = {plan.n_points} points in "
        f"{len(plan.tasks)} tasks; EOS {cfg.eos}; "
        + (f"{result.ranks} MPI ranks" if result.ranks > 1 else f"{result.workers} worker(s)")
    )


def _print_incomplete(result) -> None:
    from gcmc.pipeline.build import failure_line

    plan, missing = result.plan, result.missing
    keys = [t.key for t in missing]
    log_path = result.config.output / f"{result.config.name}.log"
    print(
        f"gcmc build: {len(missing)} of {len(plan.tasks)} task(s) failed or missing "
        f"({', '.join(keys[:8])}{'...' if len(keys) > 8 else ''}); see "
        f"{log_path}. Rerun the same command to retry them.",
        file=sys.stderr,
    )
    for t in missing[:8]:  # every rank's failures, with their coordinates
        print(f"  {failure_line(plan, t)}", file=sys.stderr)


def _summary(result) -> None:
    from gcmc.cli.kernel import _flag_tokens

    plan, data, fits, report = result.plan, result.data, result.fits, result.report
    path, seconds = result.path, result.wall_seconds

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
    # the tasks' own clocks, summed (wall time per task: on a loaded machine more than CPU)
    rows.append(("task wall-clock, summed", f"{float(np.sum(data.task_seconds)):.1f} s"))
    if result.refinement is not None:
        from gcmc.cli.kernel import refinement_lines

        for i, line in enumerate(refinement_lines(result.refinement)):
            rows.append(("refinement" if i == 0 else "", line))
    if result.equilibrium is not None and data.equilibrium is not None:
        eq, c = data.equilibrium, result.equilibrium
        rows.append(
            (
                "equilibrium",
                f"{int(eq.has_loop.sum())} pore(s) with a loop, {int(eq.has_transition.sum())} "
                f"transition(s); anchor paths: {c['tasks']} task(s), {c['points']} points, "
                f"{c['cpu_seconds']:.1f} CPU-s",
            )
        )
    rows.append(("wall time", f"{seconds:.1f} s"))
    width = max(len(r[0]) for r in rows)
    print("\n".join(f"  {k:<{width}}  {v}" for k, v in rows))
