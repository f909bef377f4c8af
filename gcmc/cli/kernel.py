"""`gcmc show KERNEL` and `gcmc export KERNEL`: inspect a kernel file, or write its points and
tables in a plain format (CSV, long format; or NPZ arrays)."""

from __future__ import annotations

import argparse
import csv
import io
import json
from collections import Counter
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from gcmc.errors import InputError
from gcmc.files import atomic_write
from gcmc.kernel.flags import count_kinds

if TYPE_CHECKING:
    from gcmc.kernel.reader import Kernel

SHOW_HELP = """Verify a kernel file (schema version and checksums) and print a summary: model,
equation of state, axes, simulated points and their flags, fitted forms and provenance."""

EXPORT_HELP = """Verify a kernel file and export it. csv: one row per simulated point (branch,
temperature, widths H and w, pressure, p/p0, density, its standard error, excess density,
isosteric heat, flags). npz: the kernel's arrays (see kernels/README.md). The output file is
written atomically."""

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
    e = sub.add_parser("export", help="export a kernel as CSV or NPZ", description=EXPORT_HELP)
    e.add_argument("kernel", metavar="KERNEL", help="a kernel file (<name>.v<version>.h5)")
    e.add_argument("--format", choices=("csv", "npz"), required=True, help="output format")
    e.add_argument("--output", required=True, metavar="PATH", help="output file")
    e.add_argument("--force", action="store_true", help="replace an existing output file")
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
        conv = fields.get("converted")
        not_conv = (
            int(np.count_nonzero(~np.asarray(conv, bool) & np.isfinite(n)))
            if conv is not None
            else 0
        )
        add(
            "points" if branch == next(iter(d.points)) else "",
            f"{branch}: {simulated} simulated, {flagged} flagged ({detail}), "
            f"{not_conv} not converged",
        )
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
    add("", f"tasks {secs.size}, cost {np.nansum(secs):.4g} s in all")
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
def _num(x: float) -> str:
    return repr(float(x))


def csv_text(kernel: Kernel) -> str:
    """The long-format CSV of `gcmc export --format csv`: one row per grid point of the
    adsorption branch (finite pressure) and per simulated point of the other branches."""
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


def npz_arrays(kernel: Kernel) -> dict[str, np.ndarray]:
    """The arrays of `gcmc export --format npz` (names documented in kernels/README.md)."""
    d = kernel.data
    out: dict[str, np.ndarray] = {}
    for name in (
        "temperatures_K",
        "widths_H_nm",
        "widths_w_nm",
        "pressures_Pa",
        "relative_pressures",
        "saturation_pressures_Pa",
        "fugacities_Pa",
        "bulk_density_per_nm3",
        "henry_per_nm3_per_pa",
        "accessible",
        "dense_pressures_Pa",
        "dense_density_per_nm3",
        "task_seeds",
        "task_seconds",
    ):
        out[name] = np.asarray(getattr(d, name))
    for branch, fields in d.points.items():
        for fname, arr in fields.items():
            out[f"points.{branch}.{fname}"] = np.asarray(arr)
        out[f"flags.{branch}"] = np.asarray(d.flags[branch], dtype=str)
    n_t, n_w = len(d.temperatures_K), len(d.widths_H_nm)
    k = max([np.asarray(r.parameters).size for row in d.fits for r in row] + [0])
    form = np.empty((n_t, n_w), dtype=object)
    n_par = np.zeros((n_t, n_w), dtype=np.int64)
    par = np.full((n_t, n_w, k), np.nan)
    cov = np.full((n_t, n_w, k, k), np.nan)
    scalars = {s: np.full((n_t, n_w), np.nan) for s in ("chi2", "reduced_chi2", "p_value", "aicc")}
    dof = np.zeros((n_t, n_w), dtype=np.int64)
    accepted = np.zeros((n_t, n_w), dtype=bool)
    for t, row in enumerate(d.fits):
        for w, r in enumerate(row):
            m = np.asarray(r.parameters).size
            form[t, w], n_par[t, w] = r.form, m
            par[t, w, :m] = r.parameters
            cov[t, w, :m, :m] = r.covariance
            for s in scalars:
                scalars[s][t, w] = getattr(r, s)
            dof[t, w], accepted[t, w] = r.dof, r.accepted
    out["fits.form"] = form.astype(str)
    out["fits.n_parameters"] = n_par
    out["fits.parameters"] = par
    out["fits.covariance"] = cov
    for s, a in scalars.items():
        out[f"fits.{s}"] = a
    out["fits.dof"] = dof
    out["fits.accepted"] = accepted
    for key, value in d.extra.items():
        out[f"extra.{key}"] = np.asarray(value)
    meta = {
        "name": d.name,
        "version": d.version,
        "schema_version": kernel.schema_version,
        "probe": d.probe,
        "solid": d.solid,
        "cutoff_nm": d.cutoff_nm,
        "box_nm": d.box_nm,
        "tail_correction": d.tail_correction,
        "eos": d.eos,
        "eos_parameters": d.eos_parameters,
        "width_convention": d.width_convention,
        "pore_volume_convention": d.pore_volume_convention,
        "sampler": d.sampler,
        "above_range": d.above_range,
        "provenance": d.provenance,
        "checksum_sha256": kernel.info.get("checksum_sha256", ""),
    }
    out["metadata_json"] = np.array(json.dumps(meta, default=_json_default))
    out["config_text"] = np.array(d.config_text)
    return out


def _json_default(o: object) -> object:
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    return str(o)


def _write_atomic(path: Path, write, force: bool) -> None:
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


def run_export(args: argparse.Namespace) -> int:
    """Run ``gcmc export``: write a kernel as CSV or NPZ (atomically); the exit code."""
    from gcmc.kernel.reader import open_kernel

    kernel = open_kernel(args.kernel)
    out = Path(args.output)
    if args.format == "csv":
        text = csv_text(kernel).encode("utf-8")
        _write_atomic(out, lambda fh: fh.write(text), args.force)
    else:
        arrays = npz_arrays(kernel)
        _write_atomic(out, lambda fh: np.savez(fh, **arrays), args.force)
    print(f"wrote {out} ({args.format})")
    return 0
