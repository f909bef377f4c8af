"""`gcmc show KERNEL` and `gcmc export KERNEL`: inspect a kernel file, or write its points and
tables in a plain format (CSV, long format; or NPZ arrays)."""

from __future__ import annotations

import argparse
import csv
import io
import json
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from gcmc.cli.common import HelpFormatter, read_number_file
from gcmc.errors import InputError
from gcmc.files import atomic_write
from gcmc.kernel.flags import count_kinds

if TYPE_CHECKING:
    from gcmc.kernel.data import KernelData
    from gcmc.kernel.reader import Kernel

SHOW_HELP = """Verify a kernel file (schema version and checksums) and print a summary: model,
equation of state, axes, simulated points and their flags, fitted forms and provenance."""

EXPORT_HELP = """Verify a kernel file and export it.
  csv: one row per simulated point (branch, temperature, widths H and w, pressure, p/p0,
       density, its standard error, excess density, isosteric heat, flags).
  npz: every dataset of the kernel file under its HDF5 path (e.g. axes/width_w_nm,
       points/adsorption/density_per_nm3; layout: kernels/README.md) and attributes_json.
  --matrix: the kernel matrix (density per nm^3 of pore volume) evaluated as the reader
       evaluates it, on your pressures (Pa or p/p0) and widths (w or H; default: the
       kernel's own): csv, a wide table with one row per pressure and one column per width,
       units in the header; npz, the axes and the (pressures x widths) matrix.
       --heat: the isosteric-heat kernel (kJ/mol) on the same axes instead, with its
       standard errors (csv: a second block of columns; npz: a second matrix).
Numbers in CSV have 12 significant digits. The output file is written atomically."""

#: CSV columns, in order (units in the names)
CSV_COLUMNS = (
    "branch",
    "temperature_K",
    "width_H_nm",
    "width_w_nm",
    "pressure_Pa",
    "relative_pressure",
    "density_per_nm3",
    "density_per_nm3_stderr",
    "density_mmol_per_cm3",
    "excess_density_per_nm3",
    "isosteric_heat_kJ_per_mol",
    "flags",
)


def register(sub: argparse._SubParsersAction) -> None:
    """Register the ``show`` and ``export`` subcommands."""
    s = sub.add_parser("show", help="summarise a kernel file", description=SHOW_HELP)
    s.add_argument("kernel", metavar="KERNEL", help="a kernel file (<name>.v<version>.h5)")
    s.set_defaults(func=run_show)
    e = sub.add_parser(
        "export",
        help="export a kernel's points, arrays or matrix as CSV or NPZ",
        description=EXPORT_HELP,
        formatter_class=HelpFormatter,
    )
    e.add_argument("kernel", metavar="KERNEL", help="a kernel file (<name>.v<version>.h5)")
    e.add_argument("--format", choices=("csv", "npz"), required=True, help="output format")
    e.add_argument("--output", required=True, metavar="PATH", help="output file")
    e.add_argument("--force", action="store_true", help="replace an existing output file")
    m = e.add_argument_group(
        "the kernel matrix (--matrix): one row per pressure, one column per width"
    )
    m.add_argument(
        "--matrix",
        action="store_true",
        help="export the kernel matrix evaluated on your pressures and widths",
    )
    m.add_argument(
        "--temperature",
        type=float,
        metavar="K",
        help="a kernel temperature (default: the kernel's only one)",
    )
    src = m.add_mutually_exclusive_group()
    src.add_argument("--pressures-Pa", metavar="FILE", help="pressures in Pa, a text file")
    src.add_argument(
        "--p-range",
        type=float,
        nargs=2,
        metavar=("LOW", "HIGH"),
        help="log-spaced pressures from LOW to HIGH Pa (--p-points of them)",
    )
    src.add_argument("--p-p0", metavar="FILE", help="relative pressures p/p0, a text file")
    src.add_argument(
        "--p-p0-range",
        type=float,
        nargs=2,
        metavar=("LOW", "HIGH"),
        help="log-spaced p/p0 from LOW to HIGH (--p-points of them)",
    )
    m.add_argument(
        "--p-points",
        type=int,
        default=30,
        help="number of pressures for --p-range or --p-p0-range",
    )
    wsrc = m.add_mutually_exclusive_group()
    wsrc.add_argument(
        "--widths-w",
        metavar="FILE",
        help="internal widths w = H - sigma_ss in nm, a text file (default: the kernel's)",
    )
    wsrc.add_argument("--widths-H", metavar="FILE", help="widths H in nm, a text file")
    q = m.add_mutually_exclusive_group()
    q.add_argument(
        "--excess", action="store_true", help="excess density instead of absolute density"
    )
    q.add_argument(
        "--heat",
        action="store_true",
        help="the isosteric-heat kernel q_st (kJ/mol) and its standard errors instead",
    )
    e.set_defaults(func=run_export)


# --------------------------------------------------------------------------------------------
# show
# --------------------------------------------------------------------------------------------
def _range(a: np.ndarray, unit: str) -> str:
    a = np.asarray(a, dtype=float)
    a = a[np.isfinite(a)]
    if a.size == 0:
        return "none"
    if a.size == 1:
        return f"{a[0]:g} {unit}"
    return f"{a.min():g} .. {a.max():g} {unit}"


def _dict_line(d: dict) -> str:
    return ", ".join(f"{k} = {v}" for k, v in d.items()) if d else "(none)"


def _flag_tokens(flags: np.ndarray) -> Counter:
    """Count flag kinds over an array of points' flags (gcmc.kernel.flags.count_kinds)."""
    return count_kinds(np.asarray(flags).ravel())


def equilibrium_line(d: KernelData) -> str:
    """The `gcmc show` line on the equilibrium transition ("" without a desorption branch):
    the pores whose branches part (gcmc.kernel.equilibrium), the pressures that bracket their
    loops, and why no transition is given."""
    from gcmc.kernel import equilibrium as eq

    if d.equilibrium is not None:  # stored (schema 1.1): the build's anchored transitions
        st = d.equilibrium
        acc = np.asarray(d.accessible, bool)
        n_loop, n_eq = int(st.has_loop[acc].sum()), int(st.has_transition[acc].sum())
        return (
            f"hysteresis loop in {n_loop}/{int(acc.sum())} accessible pores; equilibrium "
            f"transition in {n_eq} (anchored along a reversible path through "
            f"{st.hot_temperature_K:.4g} K)"
        )
    found = eq.kernel_transitions(d)
    if not found:
        return ""
    p0 = np.asarray(d.saturation_pressures_Pa, dtype=float)
    loops = [(t, j, r) for t, j, r in found if np.isfinite(r.loop_pressure_range_Pa[0])]
    with_eq = [r for _, _, r in found if r.has_transition]
    reasons = Counter(r.reason for _, _, r in found if r.reason and r.reason != eq.NO_LOOP)
    text = f"hysteresis loop in {len(loops)}/{len(found)} accessible pores"
    if loops:
        rel = all(np.isfinite(p0[t]) for t, _, _ in loops)
        lo = [r.loop_pressure_range_Pa[0] / (p0[t] if rel else 1.0) for t, _, r in loops]
        hi = [r.loop_pressure_range_Pa[1] / (p0[t] if rel else 1.0) for t, _, r in loops]
        h = sorted({float(d.widths_H_nm[j]) for _, j, _ in loops})
        h_text = f"{h[0]:g}" + (f"-{h[-1]:g}" if len(h) > 1 else "")
        text += (
            f" (H {h_text} nm; bracketed by {'p/p0' if rel else 'p'} "
            f"{min(lo):.3g}-{max(hi):.3g}{'' if rel else ' Pa'})"
        )
    text += f"; equilibrium transition in {len(with_eq)}"
    if reasons:
        text += "; none: " + "; ".join(f"{v} {k}" for k, v in reasons.most_common())
    return text


def transition_lines(d: KernelData) -> list[str]:
    """One `gcmc show` line per hysteresis loop of a kernel with a stored equilibrium branch
    (schema 1.1): T, H, the loop's bracket and the transition p_eq with its uncertainty (or
    why there is none). [] without the stored branch."""
    eq = d.equilibrium
    if eq is None:
        return []
    p0 = np.asarray(d.saturation_pressures_Pa, dtype=float)
    out = []
    for t, j in zip(*np.nonzero(np.asarray(eq.has_loop, bool)), strict=True):
        lo, hi = (float(x) for x in eq.loop_pressure_range_Pa[t, j])
        head = (
            f"T = {d.temperatures_K[t]:g} K, H = {d.widths_H_nm[j]:g} nm: loop {lo:.4g}-{hi:.4g} Pa"
        )
        if not eq.has_transition[t, j]:
            out.append(f"{head}; no transition: {eq.reason[t, j]}")
            continue
        pe, du = float(eq.pressure_Pa[t, j]), float(eq.pressure_uncertainty_Pa[t, j])
        rel = f" (p/p0 {pe / p0[t]:.3g})" if np.isfinite(p0[t]) else ""
        extra = ", extrapolated" if eq.extrapolated[t, j] else ""
        out.append(f"{head}; transition p_eq = {pe:.4g} +- {du:.2g} Pa{rel}{extra}")
    return out


def summary(kernel: Kernel) -> str:
    """The text printed by `gcmc show`."""
    d = kernel.data
    info = kernel.info
    lines: list[str] = []

    def add(key: str, text: str) -> None:
        lines.append(f"{key:<12}{text}")

    add("kernel", f"{d.name}  version {d.version}  (schema {kernel.schema_version})")
    if kernel.path is not None:
        add("file", str(kernel.path))
    add("checksum", f"sha256 {info.get('checksum_sha256', '')[:16]}... verified")
    add("probe", _dict_line(d.probe))
    add("solid", _dict_line(d.solid))
    add(
        "model",
        f"cutoff {d.cutoff_nm:g} nm, lateral box {d.box_nm:g} nm, "
        f"tail correction: {d.tail_correction}",
    )
    add("", f"width convention: {d.width_convention}; pore volume: {d.pore_volume_convention}")
    add("eos", f"{d.eos}  ({_dict_line(d.eos_parameters)})")
    add("sampler", d.sampler)
    p = np.asarray(d.pressures_Pa, dtype=float)
    add("axes", f"T: {len(d.temperatures_K)} ({_range(d.temperatures_K, 'K')})")
    add(
        "",
        f"H: {len(d.widths_H_nm)} ({_range(d.widths_H_nm, 'nm')}); "
        f"w: {len(d.widths_w_nm)} ({_range(d.widths_w_nm, 'nm')})",
    )
    per_t = [int(np.count_nonzero(np.isfinite(row))) for row in p]
    add(
        "",
        f"pressures per T: {'/'.join(map(str, per_t))} ({_range(p, 'Pa')}); "
        f"p/p0: {_range(d.relative_pressures, '')}".rstrip(),
    )
    for branch, fields in d.points.items():
        n = np.asarray(fields.get("density_per_nm3", np.full(p.shape, np.nan)), dtype=float)
        simulated = int(np.count_nonzero(np.isfinite(n)))
        flags = np.asarray(d.flags[branch])
        flagged = int(np.count_nonzero((flags != "") & np.isfinite(n)))
        tokens = _flag_tokens(flags[np.isfinite(n)])
        detail = ", ".join(f"{k} {v}" for k, v in tokens.most_common()) or "none"
        conv = fields.get("converged")
        not_conv = (
            int(np.count_nonzero(~np.asarray(conv, bool) & np.isfinite(n)))
            if conv is not None
            else 0
        )
        add(
            "points" if branch == next(iter(d.points)) else "",
            f"{branch}: {simulated} simulated, {flagged} flagged ({detail}), "
            f"{not_conv} unconverged",
        )
    eq_line = equilibrium_line(d)
    if eq_line:
        add("equilibrium", eq_line)
    for line in transition_lines(d):
        add("", line)
    acc = np.asarray(d.accessible, dtype=bool)
    smallest = []
    for t, temp in enumerate(d.temperatures_K):
        idx = np.flatnonzero(acc[t])
        smallest.append(
            f"{d.widths_H_nm[idx[0]]:g} nm at {temp:g} K" if idx.size else f"none at {temp:g} K"
        )
    add(
        "limits",
        f"accessible pores: {int(acc.sum())}/{acc.size}; smallest accessible H: "
        + "; ".join(smallest),
    )
    forms = Counter(r.form for row in d.fits for r in row)
    accepted = sum(bool(r.accepted) for row in d.fits for r in row)
    total = sum(len(row) for row in d.fits)
    add(
        "fits",
        ", ".join(f"{k} {v}" for k, v in forms.most_common())
        + f"; accepted {accepted}/{total}; above range: {d.above_range}; below range: Henry "
        "extension",
    )
    worst = None
    for t, row in enumerate(d.fits):
        for w, r in enumerate(row):
            if np.isfinite(r.reduced_chi2) and (worst is None or r.reduced_chi2 > worst[0]):
                worst = (float(r.reduced_chi2), t, w, r.form)
    if worst is not None:
        chi, t, w, name = worst
        add(
            "",
            f"worst reduced chi2 {chi:.3g} ({name}) at T = {d.temperatures_K[t]:g} K, "
            f"H = {d.widths_H_nm[w]:g} nm",
        )
    if d.heat is not None:
        deg = np.asarray(d.heat.degree)
        a0 = [d.heat.zero_loading(t)[0] for t in range(deg.shape[0])]
        a0 = np.concatenate(a0) if a0 else np.array([])
        a0 = a0[np.isfinite(a0)]
        add(
            "heat",
            f"isosteric-heat kernel at {int(np.count_nonzero(deg >= 0))}/{deg.size} "
            "(T, width) pairs"
            + (f"; zero-loading q_st {_range(a0, 'kJ/mol')}" if a0.size else "")
            + " (gcmc export --matrix --heat; Kernel.isosteric_heat)",
        )
    else:
        add("heat", "no isosteric-heat kernel in this file")
    dp = np.asarray(d.dense_pressures_Pa)
    add("dense", f"{dp.shape[1]} pressures per T ({_range(dp, 'Pa')})")
    prov = d.provenance
    add("provenance", f"created {info.get('created') or prov.get('created', 'unknown')}")
    add(
        "",
        f"code {info.get('code_version') or prov.get('code_version', 'unknown')}; "
        f"host {prov.get('host', 'unknown')}",
    )
    add("", f"config hash {info.get('config_hash', 'unknown')}")
    libs = prov.get("library_versions")
    if isinstance(libs, dict) and libs:
        add("", "libraries " + ", ".join(f"{k} {v}" for k, v in libs.items()))
    secs = np.asarray(d.task_seconds, dtype=float)
    add("", f"tasks {secs.size}, wall-clock {np.nansum(secs):.4g} s summed over tasks")
    if isinstance(prov.get("target"), dict):
        from gcmc.quality.target import QualityTarget

        try:
            add("target", QualityTarget.from_dict(prov["target"]).describe())
        except Exception as exc:  # noqa: BLE001 - show what is there, never fail on it
            add("target", f"unreadable ({exc})")
    ref = prov.get("refinement")
    if isinstance(ref, dict):
        for i, line in enumerate(refinement_lines(ref)):
            add("refinement" if i == 0 else "", line)
    if d.extra:
        add("extra", ", ".join(sorted(d.extra)))
    return "\n".join(lines)


def refinement_lines(ref: dict, details: int = 8) -> list[str]:
    """What the refinement rounds did, from a kernel's ``provenance["refinement"]``: rounds,
    widths added where and why, points rerun with what, what still fails and why."""
    rounds = ref.get("rounds", [])
    w0, w1 = ref.get("widths_initial_H_nm", []), ref.get("widths_final_H_nm", [])
    check = ref.get("check", {})
    out = [
        f"{len(rounds)} round(s); widths {len(w0)} -> {len(w1)}; "
        f"{len(ref.get('points_rerun', {}))} point(s) rerun; "
        f"{ref.get('cpu_seconds', float('nan')):.0f} of "
        f"{ref.get('budget_cpu_seconds', float('nan')):.0f} CPU-s; stopped: "
        f"{ref.get('stop', '?')}; check at build: {check.get('verdict', '?')}"
    ]
    for r in rounds:
        added = r.get("widths_added", [])
        reruns = r.get("reruns", [])
        methods = Counter(f"{x['method']} {x['effort']:g}x" for x in reruns)
        text = f"round {r['round']}: +{len(added)} width(s)"
        if added:
            text += " (H = " + ", ".join(f"{x['H_nm']:.4g}" for x in added) + " nm)"
        text += f", {len(reruns)} rerun(s)"
        if reruns:
            text += " (" + ", ".join(f"{k} x{v}" for k, v in methods.most_common()) + ")"
        if r.get("cut_by_budget"):
            text += f", {len(r['cut_by_budget'])} cut by budget"
        out.append(text)
        whys = Counter(a["why"].split(":", 1)[0] for a in added)
        for why, count in whys.most_common(3):
            out.append(f"  widths for {why} (x{count})")
    final = Counter(
        f"{x.get('method', '?')} {x.get('effort', float('nan')):g}x"
        for x in ref.get("points_rerun", {}).values()
    )
    if final:
        out.append(
            "points rerun, by the method that produced them: "
            + ", ".join(f"{k} x{v}" for k, v in final.most_common())
        )
    still = ref.get("still_failing", [])
    out.append(f"still failing: {len(still)}" + ("" if still else " (none)"))
    out += [f"  {line}" for line in still[:details]]
    if len(still) > details:
        out.append(f"  ... {len(still) - details} more (provenance refinement.still_failing)")
    bad = {k: v for k, v in check.get("criteria", {}).items() if v in ("warn", "fail")}
    if bad:
        out.append("check: " + ", ".join(f"{k} {v}" for k, v in bad.items()))
    return out


def run_show(args: argparse.Namespace) -> int:
    """Run ``gcmc show``: print a kernel's summary; the exit code."""
    from gcmc.kernel.reader import open_kernel

    print(summary(open_kernel(args.kernel)))
    return 0


# --------------------------------------------------------------------------------------------
# export
# --------------------------------------------------------------------------------------------
#: significant digits of a number in a text export: 12 keeps every digit a person reads and
#: drops the binary noise of the last bits (0.35999999999999993 -> 0.36)
DIGITS = 12


def _num(x: float) -> str:
    """A number as a person reads it: 12 significant digits, "nan"/"inf" where not finite."""
    x = float(x)
    if not np.isfinite(x):
        return "nan" if np.isnan(x) else ("inf" if x > 0 else "-inf")
    return f"{x:.{DIGITS}g}"


def csv_text(kernel: Kernel) -> str:
    """The long-format CSV of `gcmc export --format csv`: one row per grid point of the
    adsorption branch (finite pressure) and per simulated point of the other branches;
    numbers with 12 significant digits."""
    from gcmc.physics.units import MMOL_PER_CM3_PER_NM3

    d = kernel.data
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    p = np.asarray(d.pressures_Pa, dtype=float)
    rel = np.asarray(d.relative_pressures, dtype=float)
    nan = np.full((len(d.temperatures_K), len(d.widths_H_nm), p.shape[1]), np.nan)
    for branch, fields in d.points.items():
        dens = np.asarray(fields.get("density_per_nm3", nan), dtype=float)
        err = np.asarray(fields.get("density_per_nm3_stderr", nan), dtype=float)
        exc = np.asarray(fields.get("excess_density_per_nm3", nan), dtype=float)
        qst = np.asarray(fields.get("isosteric_heat_kJ_per_mol", nan), dtype=float)
        flags = np.asarray(d.flags[branch])
        for t, temp in enumerate(d.temperatures_K):
            for w, (h, ww) in enumerate(zip(d.widths_H_nm, d.widths_w_nm, strict=True)):
                for i in range(p.shape[1]):
                    if not np.isfinite(p[t, i]):
                        continue
                    if branch != "adsorption" and not np.isfinite(dens[t, w, i]):
                        continue
                    writer.writerow(
                        [
                            branch,
                            _num(temp),
                            _num(h),
                            _num(ww),
                            _num(p[t, i]),
                            _num(rel[t, i]),
                            _num(dens[t, w, i]),
                            _num(err[t, w, i]),
                            _num(dens[t, w, i] * MMOL_PER_CM3_PER_NM3),
                            _num(exc[t, w, i]),
                            _num(qst[t, w, i]),
                            str(flags[t, w, i]),
                        ]
                    )
    return buf.getvalue()


#: HDF5 bookkeeping attributes of dimension scales: file addresses and scale markers, not data
_SKIP_ATTRS = frozenset({"DIMENSION_LIST", "REFERENCE_LIST", "CLASS", "NAME"})


def _plain(value: object) -> object:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()] if value.dtype.kind in "OS" else value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    return value


def npz_arrays(kernel: Kernel) -> dict[str, np.ndarray]:
    """The arrays of `gcmc export --format npz`: every dataset of the kernel file under its
    HDF5 path (e.g. ``axes/width_w_nm``, ``limits/henry_constant_per_nm3_per_Pa``,
    ``points/adsorption/density_per_nm3``; layout: kernels/README.md), strings as unicode
    arrays, plus ``attributes_json``: every attribute, keyed by the path of its group or
    dataset (``/`` for the file's root)."""
    import h5py

    if kernel.path is None:
        raise InputError("export: the kernel has no file to export")
    out: dict[str, np.ndarray] = {}
    attrs: dict[str, dict[str, object]] = {}

    def keep_attrs(path: str, obj: h5py.HLObject) -> None:
        a = {k: _plain(v) for k, v in obj.attrs.items() if k not in _SKIP_ATTRS}
        if a:
            attrs[path] = a

    def visit(name: str, obj: h5py.HLObject) -> None:
        keep_attrs("/" + name, obj)
        if not isinstance(obj, h5py.Dataset):
            return
        if h5py.check_string_dtype(obj.dtype) is not None:
            out[name] = np.asarray(obj.asstr()[()], dtype=str)
        else:
            out[name] = np.asarray(obj[()])

    try:
        with h5py.File(kernel.path, "r") as f:
            keep_attrs("/", f)
            f.visititems(visit)
    except OSError as exc:
        raise InputError(f"{kernel.path}: cannot read ({exc})") from None
    out["attributes_json"] = np.array(json.dumps(attrs, default=_json_default, sort_keys=True))
    return out


def _json_default(o: object) -> object:
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    return str(o)


# --------------------------------------------------------------------------------------------
# the kernel matrix on the user's pressures and widths
# --------------------------------------------------------------------------------------------
@dataclass
class MatrixTable:
    """The kernel matrix on given pressures and widths, as `gcmc export --matrix` writes it.

    Attributes
    ----------
    temperature_K : float
        The kernel temperature.
    pressure_Pa : ndarray, shape (P,)
        Pressures (rows).
    relative_pressure : ndarray, shape (P,)
        p/p0 of the kernel's EOS (NaN where it has no saturation pressure).
    width_axis : str
        "w" or "H": the axis the widths were given on.
    width_H_nm, width_w_nm : ndarray, shape (W,)
        Widths (columns) on both axes.
    quantity : str
        "density_per_nm3" (absolute), "excess_density_per_nm3" or
        "isosteric_heat_kJ_per_mol".
    matrix : ndarray, shape (P, W)
        The kernel matrix: molecules per nm^3 of pore volume, or kJ/mol for the heat.
    stderr : ndarray, shape (P, W), or None
        Standard errors of the matrix (the heat kernel's; None for densities).
    """

    temperature_K: float
    pressure_Pa: np.ndarray
    relative_pressure: np.ndarray
    width_axis: str
    width_H_nm: np.ndarray
    width_w_nm: np.ndarray
    quantity: str
    matrix: np.ndarray
    stderr: np.ndarray | None = None


def matrix_table(
    kernel: Kernel,
    temperature_K: float | None = None,
    pressures_Pa: np.ndarray | None = None,
    relative_pressures: np.ndarray | None = None,
    widths_nm: np.ndarray | None = None,
    width_axis: str = "w",
    excess: bool = False,
    heat: bool = False,
) -> MatrixTable:
    """Evaluate the kernel matrix (:meth:`gcmc.reader.Kernel.evaluate`) on the given pressures
    (Pa, or p/p0 through the kernel's saturation pressure; default: the kernel's own) and
    widths (default: the kernel's own) at one kernel temperature (default: the only one)."""
    d = kernel.data
    temps = np.asarray(d.temperatures_K, dtype=float)
    if temperature_K is None:
        if temps.size != 1:
            known = ", ".join(f"{x:g}" for x in temps)
            raise InputError(f"--temperature: the kernel has several temperatures ({known} K)")
        temperature_K = float(temps[0])
    t = kernel.temperature_index(float(temperature_K))
    psat = float(np.asarray(d.saturation_pressures_Pa, dtype=float)[t])
    if relative_pressures is not None:
        if not np.isfinite(psat):
            raise InputError(
                f"--p-p0: the kernel has no saturation pressure at {temps[t]:g} K "
                "(above the critical temperature, or an ideal-gas EOS); give pressures in Pa"
            )
        p = np.asarray(relative_pressures, dtype=float) * psat
    elif pressures_Pa is not None:
        p = np.asarray(pressures_Pa, dtype=float)
    else:
        p = kernel.pressures_Pa(t)
    sigma_offset = np.asarray(d.widths_H_nm, float) - np.asarray(d.widths_w_nm, float)
    offset = float(sigma_offset[0]) if sigma_offset.size else 0.0
    if widths_nm is None:
        x = np.asarray(d.widths_w_nm if width_axis == "w" else d.widths_H_nm, dtype=float)
    else:
        x = np.asarray(widths_nm, dtype=float)
    err = None
    if heat:
        m, err = kernel.isosteric_heat(p, x, float(temps[t]), width_axis=width_axis)
        quantity = "isosteric_heat_kJ_per_mol"
    else:
        m = kernel.evaluate(
            p,
            x,
            float(temps[t]),
            width_axis=width_axis,
            quantity="excess" if excess else "absolute",
        )
        quantity = "excess_density_per_nm3" if excess else "density_per_nm3"
    with np.errstate(invalid="ignore"):
        rel = p / psat if np.isfinite(psat) else np.full(p.shape, np.nan)
    h = x if width_axis == "H" else x + offset
    w = x if width_axis == "w" else x - offset
    return MatrixTable(
        temperature_K=float(temps[t]),
        pressure_Pa=p,
        relative_pressure=rel,
        width_axis=width_axis,
        width_H_nm=h,
        width_w_nm=w,
        quantity=quantity,
        matrix=m,
        stderr=err,
    )


def matrix_csv_text(table: MatrixTable) -> str:
    """The wide CSV of `gcmc export --matrix`: one row per pressure, one column per width;
    the header names the quantity, its unit and each width with its axis."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    axis = table.width_axis
    widths = table.width_w_nm if axis == "w" else table.width_H_nm
    header = [f"{table.quantity} at {axis} = {_num(x)} nm" for x in widths]
    if table.stderr is not None:
        header += [f"{table.quantity}_stderr at {axis} = {_num(x)} nm" for x in widths]
    writer.writerow(["pressure_Pa", "relative_pressure", *header])
    for i, p in enumerate(table.pressure_Pa):
        row = [_num(v) for v in table.matrix[i]]
        if table.stderr is not None:
            row += [_num(v) for v in table.stderr[i]]
        writer.writerow([_num(p), _num(table.relative_pressure[i]), *row])
    return buf.getvalue()


def matrix_arrays(table: MatrixTable) -> dict[str, np.ndarray]:
    """The NPZ of `gcmc export --matrix`: the axes, the matrix under its quantity's name
    (shape pressures x widths) and ``units_json``."""
    units = {
        "temperature_K": "K",
        "pressure_Pa": "Pa",
        "relative_pressure": "1",
        "width_H_nm": "nm",
        "width_w_nm": "nm",
        table.quantity: (
            "kJ/mol" if table.stderr is not None else "nm^-3 (molecules per nm^3 of pore volume)"
        )
        + ", rows: pressures, columns: widths",
    }
    extra = {}
    if table.stderr is not None:
        units[f"{table.quantity}_stderr"] = units[table.quantity]
        extra[f"{table.quantity}_stderr"] = table.stderr
    return {
        **extra,
        "temperature_K": np.array(table.temperature_K),
        "pressure_Pa": table.pressure_Pa,
        "relative_pressure": table.relative_pressure,
        "width_H_nm": table.width_H_nm,
        "width_w_nm": table.width_w_nm,
        "width_axis": np.array(table.width_axis),
        table.quantity: table.matrix,
        "units_json": np.array(json.dumps(units)),
    }


def _write_atomic(path: Path, write, force: bool) -> None:  # noqa: ANN001
    if path.exists() and not force:
        raise InputError(f"--output: {path} exists (use --force to replace it)")
    if path.is_dir():
        raise InputError(f"--output: {path} is a directory")
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise InputError(f"--output: folder {folder} does not exist")
    try:
        with atomic_write(path, "wb") as fh:
            write(fh)
    except OSError as exc:
        raise InputError(f"--output: cannot write {path} ({exc})") from None


_MATRIX_OPTIONS = (
    ("temperature", "--temperature"),
    ("pressures_Pa", "--pressures-Pa"),
    ("p_range", "--p-range"),
    ("p_p0", "--p-p0"),
    ("p_p0_range", "--p-p0-range"),
    ("widths_w", "--widths-w"),
    ("widths_H", "--widths-H"),
    ("excess", "--excess"),
    ("heat", "--heat"),
)


def _matrix_from_args(kernel: Kernel, args: argparse.Namespace) -> MatrixTable:
    import math

    if args.p_points < 2:
        raise InputError(f"--p-points: need at least 2, got {args.p_points}")
    pressures = relative = None
    for opt, rng in (("--p-range", args.p_range), ("--p-p0-range", args.p_p0_range)):
        if rng is None:
            continue
        lo, hi = rng
        if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo < hi):
            raise InputError(f"{opt}: need 0 < LOW < HIGH, got {lo:g} {hi:g}")
        if opt == "--p-p0-range" and hi > 1.0:
            raise InputError(f"--p-p0-range: p/p0 above 1 ({hi:g}) is beyond saturation")
        values = np.geomspace(lo, hi, args.p_points)
        if opt == "--p-range":
            pressures = values
        else:
            relative = values
    if args.pressures_Pa is not None:
        pressures = read_number_file(args.pressures_Pa, "--pressures-Pa", " Pa")
    if args.p_p0 is not None:
        relative = read_number_file(args.p_p0, "--p-p0", "")
    widths, axis = None, "w"
    if args.widths_w is not None:
        widths = read_number_file(args.widths_w, "--widths-w", " nm")
    elif args.widths_H is not None:
        widths, axis = read_number_file(args.widths_H, "--widths-H", " nm"), "H"
    return matrix_table(
        kernel,
        temperature_K=args.temperature,
        pressures_Pa=pressures,
        relative_pressures=relative,
        widths_nm=widths,
        width_axis=axis,
        excess=args.excess,
        heat=args.heat,
    )


def run_export(args: argparse.Namespace) -> int:
    """Run ``gcmc export``: write a kernel as CSV or NPZ (atomically); the exit code."""
    from gcmc.kernel.reader import open_kernel

    if not args.matrix:
        given = [opt for dest, opt in _MATRIX_OPTIONS if getattr(args, dest) not in (None, False)]
        if given:
            raise InputError(f"{given[0]}: applies to --matrix only")
    kernel = open_kernel(args.kernel)
    out = Path(args.output)
    if args.matrix:
        table = _matrix_from_args(kernel, args)
        if args.format == "csv":
            text = matrix_csv_text(table).encode("utf-8")
            _write_atomic(out, lambda fh: fh.write(text), args.force)
        else:
            arrays = matrix_arrays(table)
            _write_atomic(out, lambda fh: np.savez(fh, **arrays), args.force)
        print(
            f"wrote {out} ({args.format}: "
            f"{'isosteric-heat kernel' if args.heat else 'kernel matrix'}, "
            f"{table.matrix.shape[0]} pressures x "
            f"{table.matrix.shape[1]} widths at {table.temperature_K:g} K)"
        )
        return 0
    if args.format == "csv":
        text = csv_text(kernel).encode("utf-8")
        _write_atomic(out, lambda fh: fh.write(text), args.force)
    else:
        arrays = npz_arrays(kernel)
        _write_atomic(out, lambda fh: np.savez(fh, **arrays), args.force)
    print(f"wrote {out} ({args.format})")
    return 0
