"""`gcmc check KERNEL` (quality checks before a kernel is used in fits) and `gcmc diff A B`
(what changed between two kernels of the same probe). The checks are in
:mod:`gcmc.quality.criteria`."""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from gcmc.cli.common import (
    DeprecatedAlias,
    HelpFormatter,
    check_report_folder,
    emit_check_report,
    read_number_file,
)
from gcmc.errors import InputError

CHECK_HELP = """Check a kernel before it is used to invert isotherms. Per temperature and pore
width: relative standard errors against a target, build flags, loading non-decreasing with
pressure, fit chi-square and residual runs, hysteresis, the lowest points against the exact
Henry constant, the smallest accessible width, the widest pore against bulk fluid plus a
surface excess. Across widths: outliers against neighbouring widths, and intervals where
interpolation in width errs by more than the errors allow (to refine). Then the resolving
power for an experiment's noise and pressures (the smallest distinguishable width step, the
singular values of the noise-weighted kernel matrix, the width above which pores are no longer
resolved) and a round trip: synthetic pore-size distributions -> isotherms with noise ->
a reference regularised inversion -> recovered volumes and modes. Each criterion gets pass,
warn or fail with its thresholds, or info where it only reports numbers (no threshold applies,
e.g. no desorption branch for the hysteresis check; info never changes the exit code). The
experiment's noise is sigma = sqrt((R n)^2 + A^2) (relative and absolute parts combined in
quadrature). Exit code 1 if any criterion fails, 0 otherwise, 2 on bad input.

With several kernels: check them as a set for one joint inversion (consistency of solid model
and conventions, smallest accessible width per probe, the resolving power of the stacked
noise-weighted kernel matrices against each member alone, a joint round trip, and each
member's own checks); --experiments gives each member its own pressures and noise, and
--plan-widths ranks kernels by the resolution they add at given widths."""

DIFF_HELP = """Compare two kernels of the same probe: what changed in the model, the equation of
state and the grids, and, per width, the largest deviation between them in units of the
combined standard errors (on A's widths and pressures; where the grids differ, B is evaluated
there through its fits and its errors are interpolated). Exit code 1 if some width deviates by
more than --max-sigma, 0 if they agree, 2 on bad input (including kernels of different
probes)."""


def register(sub: argparse._SubParsersAction) -> None:
    """Register the ``check`` and ``diff`` subcommands."""
    c = sub.add_parser(
        "check",
        help="quality checks of a kernel",
        description=CHECK_HELP,
        formatter_class=HelpFormatter,
    )
    c.add_argument(
        "kernel",
        metavar="KERNEL",
        nargs="+",
        help="a kernel file (<name>.v<version>.h5); several: check them as a set",
    )
    c.add_argument(
        "--target-rel-stderr",
        type=float,
        default=None,
        metavar="R",
        help="target relative standard error of a point (default: the kernel's stored "
        "target, else 0.02)",
    )
    c.add_argument(
        "--target-rel-error",
        dest="target_rel_stderr",
        type=float,
        action=DeprecatedAlias,
        new="--target-rel-stderr",
    )
    n = c.add_argument_group("experiment (resolving power and round trip)")
    n.add_argument(
        "--noise-rel",
        type=float,
        default=None,
        metavar="R",
        help="relative noise R of a measured amount n (sigma = sqrt((R n)^2 + A^2); "
        "default: the kernel's stored target, else 0.01)",
    )
    n.add_argument(
        "--noise-abs-mmol-cm3",
        type=float,
        default=None,
        metavar="A",
        help="absolute noise of a measured amount, mmol per cm3 of pore volume (default: "
        "the kernel's stored target, else 0.01)",
    )
    src = n.add_mutually_exclusive_group()
    src.add_argument(
        "--pressures-Pa",
        metavar="FILE",
        help="the experiment's pressures in Pa, a text file (numbers separated by "
        "spaces, commas or new lines; '#' starts a comment); default: the "
        "kernel's stored target's, else the kernel's own",
    )
    src.add_argument(
        "--p-range",
        type=float,
        nargs=2,
        metavar=("LOW", "HIGH"),
        help="log-spaced pressures from LOW to HIGH Pa (--p-points of them)",
    )
    n.add_argument("--p-points", type=int, default=30, help="number of pressures for --p-range")
    n.add_argument(
        "--temperature",
        type=float,
        metavar="K",
        help="check this kernel temperature only (default: every temperature)",
    )
    r = c.add_argument_group("resolving power")
    r.add_argument(
        "--chi2-threshold",
        type=float,
        default=1.0,
        help="Delta-chi2 at which two isotherms count as distinguishable",
    )
    r.add_argument(
        "--resolution-fraction",
        type=float,
        default=0.25,
        metavar="RHO",
        help="a width w is resolved when two pores at w(1 -+ RHO) can be told from one",
    )
    t = c.add_argument_group("round trip")
    t.add_argument(
        "--inversion",
        choices=("gcv", "l-curve"),
        default="gcv",
        help="how the reference inversion chooses its regularisation",
    )
    t.add_argument("--realisations", type=int, default=12, help="noise realisations per PSD")
    t.add_argument(
        "--pore-volume",
        type=float,
        default=0.5,
        metavar="CM3_G",
        help="total pore volume of the synthetic samples, cm3/g",
    )
    t.add_argument("--seed", type=int, default=2026, help="seed of the synthetic noise")
    o = c.add_argument_group("output")
    o.add_argument(
        "--report", metavar="DIR", help="write plots (PNG and PDF) and check.json into DIR"
    )
    o.add_argument("--json", action="store_true", help="print one JSON object")
    from gcmc.cli.check_set import add_arguments as _set_arguments

    _set_arguments(c)
    c.set_defaults(func=run_check)

    d = sub.add_parser(
        "diff",
        help="compare two kernels of the same probe",
        description=DIFF_HELP,
        formatter_class=HelpFormatter,
    )
    d.add_argument("a", metavar="A", help="a kernel file")
    d.add_argument("b", metavar="B", help="another kernel file of the same probe")
    d.add_argument(
        "--max-sigma",
        type=float,
        default=3.0,
        help="largest deviation (combined sigma) for the kernels to agree",
    )
    d.add_argument("--json", action="store_true", help="print one JSON object")
    d.set_defaults(func=run_diff)


def _positive(name: str, value: float | None, allow_zero: bool = False) -> None:
    if value is None:
        return
    if not math.isfinite(value) or value < 0 or (value == 0 and not allow_zero):
        raise InputError(
            f"--{name}: must be a finite number {'>=' if allow_zero else '>'} 0, got {value}"
        )


def read_pressure_file(path: str) -> list[float]:
    """Pressures (Pa) from a text file: numbers separated by white space or commas, '#'
    comments, at least two. InputError naming the file for anything else."""
    return [float(x) for x in read_number_file(path, "--pressures-Pa", " Pa", minimum=2)]


def validate_common(args: argparse.Namespace, target: Any = None) -> None:
    """The checks of the options shared by the single and the set check. Options not given
    take the values of ``target`` (a kernel's stored QualityTarget), else the defaults."""
    _positive("target-rel-stderr", args.target_rel_stderr)
    _positive("noise-rel", args.noise_rel, allow_zero=True)
    _positive("noise-abs-mmol-cm3", args.noise_abs_mmol_cm3, allow_zero=True)
    if args.target_rel_stderr is None:
        args.target_rel_stderr = target.target_rel_stderr if target else 0.02
    if args.noise_rel is None:
        args.noise_rel = target.noise_rel if target else 0.01
    if args.noise_abs_mmol_cm3 is None:
        args.noise_abs_mmol_cm3 = target.noise_abs_mmol_cm3 if target else 0.01
    _positive("chi2-threshold", args.chi2_threshold)
    _positive("resolution-fraction", args.resolution_fraction)
    _positive("pore-volume", args.pore_volume)
    _positive("temperature", args.temperature)
    if args.realisations < 2:
        raise InputError(f"--realisations: need at least 2, got {args.realisations}")
    if args.noise_rel == 0 and args.noise_abs_mmol_cm3 == 0:
        raise InputError("--noise-rel/--noise-abs-mmol-cm3: cannot both be 0")


def experiment_pressures(args: argparse.Namespace) -> Any:
    """The experiment's pressures from --pressures-Pa or --p-range (None: the kernel's own)."""
    import numpy as np

    pressures = None
    if args.pressures_Pa is not None:
        pressures = np.array(read_pressure_file(args.pressures_Pa))
    elif args.p_range is not None:
        lo, hi = args.p_range
        for v in (lo, hi):
            _positive("p-range", v)
        if not lo < hi:
            raise InputError(f"--p-range: LOW must be below HIGH, got {lo:g} {hi:g}")
        if args.p_points < 2:
            raise InputError(f"--p-points: need at least 2, got {args.p_points}")
        pressures = np.geomspace(lo, hi, args.p_points)
    return pressures


def run_check(args: argparse.Namespace) -> int:
    """Run ``gcmc check``: judge a kernel (or a set), print the verdicts, write the report;
    the exit code."""
    from gcmc.cli.check_set import run_check_set, wants_set
    from gcmc.kernel.reader import open_kernel
    from gcmc.quality.criteria import CheckSettings, format_table, run_checks
    from gcmc.quality.resolution import NoiseModel

    if wants_set(args):
        return run_check_set(args)
    if args.skip_member_checks:
        raise InputError("--skip-member-checks: only for a set of kernels")
    kernel = open_kernel(args.kernel[0])
    target = stored_target(kernel)
    validate_common(args, target)
    pressures = experiment_pressures(args)
    if pressures is None and target is not None and target.pressures_Pa is not None:
        pressures = target.pressures_array()
    check_report_folder(args.report)
    temps = None if args.temperature is None else (float(args.temperature),)
    if temps is not None:
        kernel.temperature_index(temps[0])  # InputError naming the kernel's temperatures
    settings = CheckSettings(
        target_rel_stderr=args.target_rel_stderr,
        noise=NoiseModel(args.noise_rel, args.noise_abs_mmol_cm3),
        pressures_Pa=pressures,
        temperatures_K=temps,
        chi2_threshold=args.chi2_threshold,
        resolution_fraction=args.resolution_fraction,
        realisations=args.realisations,
        seed=args.seed,
        pore_volume_cm3_g=args.pore_volume,
        inversion_method=args.inversion,
    )
    report = run_checks(kernel, settings)
    if target is not None and not args.json:
        print(f"target (stored in the kernel; options override): {target.describe()}")
    written = []
    if args.report is not None:
        from gcmc.quality.report import write_report

        written = write_report(report, kernel, args.report)
    table = None if args.json else format_table(report)
    return emit_check_report(report, table, written, args.report)


def stored_target(kernel):  # noqa: ANN001, ANN201 - a gcmc.reader.Kernel
    """The quality target a kernel was built for (its provenance's ``target``), or None."""
    from gcmc.quality.target import QualityTarget

    d = kernel.data.provenance.get("target") if isinstance(kernel.data.provenance, dict) else None
    if d is None:
        return None
    return QualityTarget.from_dict(d, where=f"{args_label(kernel)}: provenance target")


def args_label(kernel) -> str:  # noqa: ANN001
    return str(kernel.path) if kernel.path is not None else kernel.name


def run_diff(args: argparse.Namespace) -> int:
    """Run ``gcmc diff``: compare two kernels and print the differences; the exit code."""
    from gcmc.kernel.reader import open_kernel
    from gcmc.quality.diff import diff_kernels, format_diff

    _positive("max-sigma", args.max_sigma)
    a = open_kernel(args.a)
    b = open_kernel(args.b)
    rep = diff_kernels(a, b, max_sigma=args.max_sigma)
    if args.json:
        json.dump(rep.to_dict(), sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print(format_diff(rep))
    return 1 if rep.largest() > rep.max_sigma else 0
