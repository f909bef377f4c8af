"""`gcmc check K1 K2 ...`: a set of kernels (several probes or temperatures of one pore
structure) checked as one joint inversion would use them, and `--plan-widths`: which kernel
adds the most resolution at given widths. The checks are in :mod:`gcmc.quality.joint`; with one
kernel and none of the options below, `gcmc check` runs the single check (gcmc/cli/check.py).

Experiments file (``--experiments FILE``, TOML): one table per member, named by the kernel's
file name, its file name without ``.h5``, or the kernel's name (quote names that contain dots:
``["ch4-slit.v1.h5"]``). Keys, all optional (the command-line values are the defaults):
``temperature_K``; ``noise_rel``; ``noise_abs_mmol_cm3``; the pressures as one of
``pressures_Pa`` (a list), ``pressures_file`` (a text file as for --pressures-Pa, relative to
the TOML file) or ``p_range`` (two numbers, Pa) with ``p_points``.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import tomllib
from pathlib import Path
from typing import Any

from gcmc.cli.common import check_report_folder, emit_check_report
from gcmc.errors import InputError

TABLE_KEYS = (
    "temperature_K",
    "noise_rel",
    "noise_abs_mmol_cm3",
    "pressures_Pa",
    "pressures_file",
    "p_range",
    "p_points",
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The set options of `gcmc check` (called by gcmc/cli/check.py)."""
    g = parser.add_argument_group("a set of kernels (two or more KERNELs, or the options below)")
    g.add_argument(
        "--experiments",
        metavar="TOML",
        help="each member's own experiment: one table per kernel (pressures, noise, "
        "temperature); kernels without a table use the command-line experiment",
    )
    g.add_argument(
        "--plan-widths",
        type=float,
        nargs="+",
        metavar="W",
        help="widths (w, nm) to be resolved: rank the --candidates by the resolution they add "
        "to the KERNELs (without --candidates: rank the KERNELs, best first, greedily)",
    )
    g.add_argument(
        "--candidates",
        nargs="+",
        metavar="KERNEL",
        help="kernels that could be added (e.g. cheap screening builds of another gas or "
        "temperature), for --plan-widths",
    )
    g.add_argument(
        "--skip-member-checks",
        action="store_true",
        help="do not run each member's own single check",
    )


def wants_set(args: argparse.Namespace) -> bool:
    """True when `gcmc check` is asked about a set (or a plan) rather than one kernel."""
    return (
        len(args.kernel) > 1
        or args.experiments is not None
        or args.plan_widths is not None
        or args.candidates is not None
    )


def _number(where: str, key: str, value: Any, positive: bool = True) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(f"{where}: {key} must be a number, got {value!r}")
    v = float(value)
    if not math.isfinite(v) or v < 0 or (positive and v == 0):
        raise InputError(f"{where}: {key} must be finite and {'>' if positive else '>='} 0")
    return v


def read_experiments(path: str) -> dict[str, dict[str, Any]]:
    """The experiments file: table name -> {temperature_K, noise_rel, noise_abs_mmol_cm3,
    pressures_Pa (numpy array or None)}. InputError naming the file, table and key for
    anything else."""
    import numpy as np

    from gcmc.cli.check import read_pressure_file

    p = Path(path)
    try:
        raw = tomllib.loads(p.read_text())
    except OSError as exc:
        raise InputError(f"--experiments {path}: cannot read ({exc.strerror or exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"--experiments {path}: not valid TOML ({exc})") from None
    if not raw:
        raise InputError(f"--experiments {path}: no member tables")
    out = {}
    for name, table in raw.items():
        where = f"--experiments {path}: [{name}]"
        if not isinstance(table, dict):
            raise InputError(f"{where}: must be a table of keys, got a value")
        for key, value in table.items():
            if isinstance(value, dict):
                raise InputError(
                    f"{where}: nested table {key!r}; quote member names that contain dots, "
                    f'e.g. ["{name}.{key}"]'
                )
            if key not in TABLE_KEYS:
                raise InputError(f"{where}: unknown key {key!r} (known: {', '.join(TABLE_KEYS)})")
        given = [k for k in ("pressures_Pa", "pressures_file", "p_range") if k in table]
        if len(given) > 1:
            raise InputError(f"{where}: give only one of {', '.join(given)}")
        entry: dict[str, Any] = {"pressures_Pa": None}
        if "temperature_K" in table:
            entry["temperature_K"] = _number(where, "temperature_K", table["temperature_K"])
        for key in ("noise_rel", "noise_abs_mmol_cm3"):
            if key in table:
                entry[key] = _number(where, key, table[key], positive=False)
        if "pressures_Pa" in table:
            vals = table["pressures_Pa"]
            if not isinstance(vals, list) or len(vals) < 2:
                raise InputError(f"{where}: pressures_Pa must be a list of at least 2 numbers")
            entry["pressures_Pa"] = np.array([_number(where, "pressures_Pa", v) for v in vals])
        elif "pressures_file" in table:
            f = table["pressures_file"]
            if not isinstance(f, str):
                raise InputError(f"{where}: pressures_file must be a file name")
            try:
                entry["pressures_Pa"] = np.array(read_pressure_file(str(p.parent / f)))
            except InputError as exc:
                raise InputError(f"{where}: {exc}") from None
        elif "p_range" in table:
            r = table["p_range"]
            if not isinstance(r, list) or len(r) != 2:
                raise InputError(f"{where}: p_range must be [LOW, HIGH] in Pa")
            lo, hi = (_number(where, "p_range", v) for v in r)
            if not lo < hi:
                raise InputError(f"{where}: p_range LOW must be below HIGH")
            n = table.get("p_points", 30)
            if isinstance(n, bool) or not isinstance(n, int) or n < 2:
                raise InputError(f"{where}: p_points must be an integer >= 2")
            entry["pressures_Pa"] = np.geomspace(lo, hi, n)
        elif "p_points" in table:
            raise InputError(f"{where}: p_points without p_range")
        out[name] = entry
    return out


def _names(kernel: Any, path: str) -> set[str]:
    p = Path(path)
    names = {p.name, p.stem, str(kernel.name), path}
    if p.name.endswith(".h5"):
        names.add(p.name[: -len(".h5")])
    return names


def _members(
    paths: list[str],
    args: argparse.Namespace,
    tables: dict[str, dict[str, Any]],
    used: set[str],
    default_pressures: Any,
) -> list[Any]:
    from gcmc.kernel.reader import open_kernel
    from gcmc.quality.joint import Experiment, kernel_label, make_member
    from gcmc.quality.resolution import NoiseModel

    out = []
    for path in paths:
        kernel = open_kernel(path)
        names = _names(kernel, path)
        hits = [n for n in tables if n in names]
        if len(hits) > 1:
            raise InputError(f"--experiments: tables {', '.join(hits)} all name {path}; keep one")
        table = tables[hits[0]] if hits else {}
        used.update(hits)
        noise = NoiseModel(
            table.get("noise_rel", args.noise_rel),
            table.get("noise_abs_mmol_cm3", args.noise_abs_mmol_cm3),
        )
        pressures = table.get("pressures_Pa")
        if pressures is None:
            pressures = default_pressures
        exp = Experiment(pressures, noise)
        temps = [float(x) for x in kernel.data.temperatures_K]
        if "temperature_K" in table:
            temps = [table["temperature_K"]]
        elif args.temperature is not None:
            temps = [float(args.temperature)]
        for temp in temps:
            label = kernel_label(kernel) + (
                f" @ {temp:g} K" if len(kernel.data.temperatures_K) > 1 else ""
            )
            out.append(make_member(kernel, temp, exp, label))
    return out


def run_check_set(args: argparse.Namespace) -> int:
    """`gcmc check K1 K2 ...` (and `--plan-widths`)."""
    from gcmc.cli.check import experiment_pressures, validate_common
    from gcmc.quality.joint import (
        SetSettings,
        format_plan,
        format_set_table,
        plan,
        run_set_checks,
    )

    validate_common(args)
    default_pressures = experiment_pressures(args)
    if args.candidates is not None and args.plan_widths is None:
        raise InputError("--candidates: only with --plan-widths")
    tables = read_experiments(args.experiments) if args.experiments is not None else {}
    used: set[str] = set()
    members = _members(list(args.kernel), args, tables, used, default_pressures)
    candidates = (
        _members(list(args.candidates), args, tables, used, default_pressures)
        if args.candidates
        else []
    )
    unused = sorted(set(tables) - used)
    if unused:
        raise InputError(
            f"--experiments {args.experiments}: table [{unused[0]}] names none of the kernels given"
        )
    if args.plan_widths is not None:
        if args.report is not None:
            raise InputError("--report: not with --plan-widths (the plan is a table)")
        if candidates:
            result = plan(
                args.plan_widths, candidates, members, args.chi2_threshold, args.resolution_fraction
            )
        else:
            result = plan(
                args.plan_widths, members, None, args.chi2_threshold, args.resolution_fraction
            )
        if args.json:
            json.dump(result.to_dict(), sys.stdout, indent=1)
            sys.stdout.write("\n")
        else:
            print(format_plan(result))
        return 0
    check_report_folder(args.report)
    settings = SetSettings(
        target_rel_stderr=args.target_rel_stderr,
        chi2_threshold=args.chi2_threshold,
        resolution_fraction=args.resolution_fraction,
        realisations=args.realisations,
        seed=args.seed,
        pore_volume_cm3_g=args.pore_volume,
        inversion_method=args.inversion,
        member_health=not args.skip_member_checks,
    )
    report = run_set_checks(members, settings)
    written = []
    if args.report is not None:
        from gcmc.quality.joint_report import write_set_report

        written = write_set_report(report, args.report)
    table = None if args.json else format_set_table(report)
    return emit_check_report(report, table, written, args.report)
