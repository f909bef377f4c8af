"""Plots of a kernel check (``gcmc check --report DIR``): PNG and PDF of each figure.

Figures are drawn on :class:`matplotlib.figure.Figure` objects with the Agg canvas (no pyplot,
no global backend state, no display needed). Every file is written under a temporary name in
the target folder and renamed when complete, so an interrupted report leaves no half-written
plot behind.

Per temperature T (file stem suffix ``_<T>K``):
* ``isotherms``: simulated points with error bars and the kernel as the reader evaluates it,
  coloured by pore width;
* ``relative-errors``: heat map of the relative standard errors over (pressure, width);
* ``resolving-power``: single-pore step dw_1 and two-pore half-separation dw_2 against width,
  the line rho w and the resolved limit;
* ``singular-values``: spectrum of the noise-weighted kernel matrix;
* ``round-trip``: synthetic PSDs against the recovered ones (median and 16-84 % band);
and ``overview`` (isotherms, relative errors, resolving power, one round trip) for the first
temperature, plus ``check.json`` with the full result.
"""

from __future__ import annotations

import json
import os
import warnings
from pathlib import Path

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LogNorm, Normalize
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from gcmc.errors import InputError
from gcmc.files import atomic_path, atomic_write
from gcmc.kernel.reader import Kernel
from gcmc.physics.units import MMOL_PER_CM3_PER_NM3
from gcmc.quality.criteria import CheckReport, RoundTrip
from gcmc.quality.resolution import ResolvingPower

FORMATS = ("png", "pdf")
_VERDICT_COLOUR = {"pass": "#1a7f37", "info": "#57606a", "warn": "#b08800", "fail": "#cf222e"}


def _figure(width: float, height: float) -> Figure:
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    return fig


def _save(fig: Figure, folder: Path, stem: str) -> list[Path]:
    """Lay the figure out once (tight layout) and write it as PNG and PDF."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # "not compatible with tight_layout"
        fig.tight_layout()
    out = []
    for fmt in FORMATS:
        final = folder / f"{stem}.{fmt}"
        with atomic_path(final) as tmp:
            fig.savefig(tmp, format=fmt, dpi=150)
        out.append(final)
    return out


def _t_suffix(temperature_K: float) -> str:
    return f"{temperature_K:g}K".replace(".", "p")


# --------------------------------------------------------------------------------------------
# panels
# --------------------------------------------------------------------------------------------
def plot_isotherms(ax, kernel: Kernel, t: int) -> None:
    """Panel: the kernel's isotherms at one temperature."""
    d = kernel.data
    temp = float(d.temperatures_K[t])
    p = np.asarray(d.pressures_Pa[t], float)
    pts = d.points["adsorption"]
    n = np.asarray(pts["density_per_nm3"], float)[t] * MMOL_PER_CM3_PER_NM3
    e = np.asarray(pts["density_per_nm3_stderr"], float)[t] * MMOL_PER_CM3_PER_NM3
    acc = np.flatnonzero(d.accessible[t])
    w = np.asarray(d.widths_w_nm, float)
    ok_p = np.isfinite(p) & (p > 0)
    dense = np.geomspace(np.min(p[ok_p]), np.max(p[ok_p]), 200)
    curves = kernel.evaluate(dense, w[acc], temp) * MMOL_PER_CM3_PER_NM3 if acc.size else None
    norm = Normalize(vmin=float(w[acc].min()), vmax=float(w[acc].max())) if acc.size else None
    cmap = colormaps["viridis"]
    for c, j in enumerate(acc):
        col = cmap(norm(w[j]))
        ok = np.isfinite(n[j]) & ok_p
        ax.errorbar(
            p[ok],
            n[j, ok],
            yerr=np.where(np.isfinite(e[j, ok]), e[j, ok], 0.0),
            fmt="o",
            ms=2.5,
            color=col,
            elinewidth=0.7,
            capsize=0,
        )
        ax.plot(dense, curves[:, c], "-", lw=0.9, color=col)
    ax.set_xscale("log")
    ax.set_xlabel("pressure (Pa)")
    ax.set_ylabel("absolute density (mmol/cm$^3$ pore)")
    ax.set_title(f"{d.name}: isotherms at {temp:g} K (points and kernel)", fontsize=9)
    if norm is not None:
        sm = ax.figure.colorbar(_scalar_mappable(cmap, norm), ax=ax)
        sm.set_label("pore width w (nm)")


def _scalar_mappable(cmap, norm):
    from matplotlib.cm import ScalarMappable

    sm = ScalarMappable(norm=norm, cmap=cmap)
    sm.set_array([])
    return sm


def plot_relative_errors(ax, kernel: Kernel, t: int, target: float) -> None:
    """Panel: relative standard errors of the points against the target."""
    d = kernel.data
    p = np.asarray(d.pressures_Pa[t], float)
    pts = d.points["adsorption"]
    n = np.asarray(pts["density_per_nm3"], float)[t]
    e = np.asarray(pts["density_per_nm3_stderr"], float)[t]
    acc = np.flatnonzero(d.accessible[t])
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(n > 0, e / n, np.nan)[acc]
    rel = np.where(rel > 0, rel, np.nan)
    w = np.asarray(d.widths_w_nm, float)[acc]
    ok = np.isfinite(p)
    finite = rel[np.isfinite(rel)]
    lo = float(np.min(finite)) if finite.size else 1e-3
    hi = float(np.max(finite)) if finite.size else 1e-1
    lo, hi = min(lo, 0.2 * target), max(hi, 2.0 * target)
    x_edges = np.arange(np.count_nonzero(ok) + 1) - 0.5
    y_edges = np.arange(acc.size + 1) - 0.5
    mesh = ax.pcolormesh(
        x_edges, y_edges, rel[:, ok], norm=LogNorm(vmin=lo, vmax=hi), cmap="magma_r", shading="flat"
    )
    over = np.argwhere(rel[:, ok] > target)
    if over.size:
        ax.plot(
            over[:, 1],
            over[:, 0],
            "x",
            color="white",
            ms=4,
            mew=1.0,
            label=f"above target {target:g}",
        )
        ax.legend(loc="upper right", fontsize=7, framealpha=0.6)
    cb = ax.figure.colorbar(mesh, ax=ax)
    cb.set_label("relative standard error")
    xt = np.linspace(0, np.count_nonzero(ok) - 1, min(6, np.count_nonzero(ok))).round().astype(int)
    ax.set_xticks(xt, [f"{v:.2g}" for v in p[ok][xt]], fontsize=7)
    yt = np.linspace(0, acc.size - 1, min(8, acc.size)).round().astype(int)
    ax.set_yticks(yt, [f"{v:.3g}" for v in w[yt]], fontsize=7)
    ax.set_xlabel("pressure (Pa)")
    ax.set_ylabel("pore width w (nm)")
    ax.set_title("relative standard errors of the points", fontsize=9)


def plot_resolving_power(ax, res: ResolvingPower) -> None:
    """Panel: resolving power against width."""
    w = res.widths_w_nm
    rho = res.resolution_fraction
    ax.plot(
        w,
        res.pair_half_separation_nm,
        "o-",
        ms=3,
        color="#0969da",
        label="two-pore half-separation $\\delta w_2$",
    )
    ax.plot(
        w,
        res.single_step_nm,
        "s--",
        ms=2.5,
        color="#8250df",
        label="single-pore step $\\delta w_1$ (volume free)",
    )
    ax.plot(w, rho * w, "k:", lw=1.0, label=f"resolved limit {rho:g} w")
    if np.isfinite(res.limit_w_nm):
        ax.axvline(res.limit_w_nm, color="#cf222e", lw=1.0)
        ax.axvspan(w[0], res.limit_w_nm, color="#2da44e", alpha=0.08)
        ax.text(
            res.limit_w_nm,
            0.02,
            f"  not resolved above w = {res.limit_w_nm:.3g} nm",
            transform=ax.get_xaxis_transform(),
            fontsize=7,
            color="#cf222e",
        )
    elif res.all_resolved:
        ax.axvspan(w[0], w[-1], color="#2da44e", alpha=0.08)
    ax.set_yscale("log")
    ax.set_xlabel("pore width w (nm)")
    ax.set_ylabel("width resolution (nm)")
    ax.set_title(
        f"resolving power at {res.temperature_K:g} K, {res.pressures_Pa[0]:.2g}-"
        f"{res.pressures_Pa[-1]:.2g} Pa, noise {res.noise.relative:g} rel + "
        f"{res.noise.absolute_mmol_cm3:g} mmol/cm$^3$",
        fontsize=9,
    )
    ax.legend(fontsize=7, loc="upper left")


def plot_singular_values(ax, res: ResolvingPower) -> None:
    """Panel: singular values of the kernel matrix."""
    s = res.singular_values
    k = np.arange(1, s.size + 1)
    ax.semilogy(k, np.where(s > 0, s, np.nan), "o-", ms=3, color="#0969da")
    ax.axhline(1.0, color="#cf222e", lw=1.0, ls=":")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("index")
    ax.set_ylabel("singular value (noise units per unit pore volume)")
    ax.set_title(
        f"noise-weighted kernel matrix at {res.temperature_K:g} K: "
        f"{res.n_significant} singular value(s) >= 1",
        fontsize=9,
    )


def plot_round_trip(ax, rt: RoundTrip) -> None:
    """Panel: a synthetic PSD and its recoveries."""
    med, lo, hi = rt.recovered_band()
    ax.fill_between(
        rt.widths_nm, lo, hi, color="#0969da", alpha=0.2, lw=0, label="recovered 16-84 %"
    )
    ax.plot(rt.widths_nm, med, "-", color="#0969da", lw=1.2, label="recovered median")
    ax.plot(rt.widths_nm, rt.true_psd, "k--", lw=1.0, label="synthetic")
    for c in rt.modes_true:
        ax.axvline(c, color="k", lw=0.5, alpha=0.4)
    state = rt.verdict if rt.resolvable else "not resolvable"
    mv, _ = rt.volume_rel_error
    ax.set_title(
        f"{rt.psd.name}\n{state} (volume {100 * mv:+.1f} %)",
        fontsize=8,
        color=_VERDICT_COLOUR.get(rt.verdict if rt.resolvable else "info"),
    )
    ax.set_xlabel("pore width w (nm)")
    ax.set_ylabel("PSD (cm$^3$/g/nm)")
    ax.legend(fontsize=6, loc="upper right")


# --------------------------------------------------------------------------------------------
# figures
# --------------------------------------------------------------------------------------------
def write_report(report: CheckReport, kernel: Kernel, folder: str | Path) -> list[Path]:
    """Write the figures (PNG and PDF) and check.json into ``folder``; return the paths."""
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"--report {folder}: cannot create the folder ({exc})") from None
    if not os.access(folder, os.W_OK):
        raise InputError(f"--report {folder}: folder is not writable")
    out: list[Path] = []
    d = kernel.data
    temps = sorted(
        {r.temperature_K for r in report.resolving}
        | {float(d.temperatures_K[t]) for t in _report_ts(report, kernel)}
    )
    for temp in temps:
        t = kernel.temperature_index(temp)
        sfx = _t_suffix(temp)
        fig = _figure(6.4, 4.4)
        plot_isotherms(fig.add_subplot(), kernel, t)
        out += _save(fig, folder, f"isotherms_{sfx}")
        fig = _figure(6.4, 4.4)
        plot_relative_errors(fig.add_subplot(), kernel, t, report.settings.target_rel_error)
        out += _save(fig, folder, f"relative-errors_{sfx}")
        res = [r for r in report.resolving if r.temperature_K == temp]
        if res:
            fig = _figure(6.4, 4.4)
            plot_resolving_power(fig.add_subplot(), res[0])
            out += _save(fig, folder, f"resolving-power_{sfx}")
            fig = _figure(6.4, 4.4)
            plot_singular_values(fig.add_subplot(), res[0])
            out += _save(fig, folder, f"singular-values_{sfx}")
        trips = [rt for rt in report.round_trips if rt.temperature_K == temp]
        if trips:
            fig = _figure(3.6 * len(trips), 3.4)
            for i, rt in enumerate(trips):
                plot_round_trip(fig.add_subplot(1, len(trips), i + 1), rt)
            out += _save(fig, folder, f"round-trip_{sfx}")
    if temps:
        out += _save(overview_figure(report, kernel, temps[0]), folder, "overview")
    final = folder / "check.json"
    with atomic_write(final, "w") as fh:
        json.dump(report.to_dict(), fh, indent=1)
    out.append(final)
    return out


def _report_ts(report: CheckReport, kernel: Kernel) -> list[int]:
    s = report.settings.temperatures_K
    if s is None:
        return list(range(len(kernel.data.temperatures_K)))
    return [kernel.temperature_index(float(x)) for x in s]


def overview_figure(report: CheckReport, kernel: Kernel, temperature_K: float) -> Figure:
    """Isotherms, relative errors, resolving power and round trips on one page."""
    t = kernel.temperature_index(temperature_K)
    trips = [rt for rt in report.round_trips if rt.temperature_K == temperature_K]
    fig = _figure(11.0, 8.2)
    grid = fig.add_gridspec(2, 2)
    plot_isotherms(fig.add_subplot(grid[0, 0]), kernel, t)
    plot_relative_errors(fig.add_subplot(grid[0, 1]), kernel, t, report.settings.target_rel_error)
    res = [r for r in report.resolving if r.temperature_K == temperature_K]
    if res:
        plot_resolving_power(fig.add_subplot(grid[1, 0]), res[0])
    if trips:
        sub = grid[1, 1].subgridspec(1, min(len(trips), 2))
        chosen = (
            [rt for rt in trips if rt.resolvable][:1]
            + [rt for rt in trips if not rt.resolvable][:1]
        ) or trips[:2]
        for i, rt in enumerate(chosen[:2]):
            plot_round_trip(fig.add_subplot(sub[0, i]), rt)
    counts = {v: sum(c.verdict == v for c in report.criteria) for v in ("fail", "warn")}
    fig.suptitle(
        f"gcmc check: {report.kernel_name} v{report.kernel_version} - verdict "
        f"{report.verdict.upper()} ({counts['fail']} fail, {counts['warn']} warn)",
        color=_VERDICT_COLOUR[report.verdict],
        fontsize=11,
    )
    return fig


__all__ = [
    "FORMATS",
    "new_figure",
    "overview_figure",
    "plot_isotherms",
    "plot_relative_errors",
    "plot_resolving_power",
    "plot_round_trip",
    "plot_singular_values",
    "report_folder",
    "save_figure",
    "write_json",
    "write_report",
]


# --------------------------------------------------------------------------------------------
# the machinery, for other report pages (gcmc.quality.joint_report)
# --------------------------------------------------------------------------------------------
def new_figure(width: float, height: float) -> Figure:
    """A matplotlib Figure (inches) on the Agg canvas: no pyplot, no display needed."""
    return _figure(width, height)


def save_figure(fig: Figure, folder: Path, stem: str) -> list[Path]:
    """Lay the figure out and write ``<stem>.png`` and ``<stem>.pdf`` into ``folder``, each
    under a temporary name renamed when complete; return the paths."""
    return _save(fig, folder, stem)


def write_json(data: object, folder: Path, name: str) -> Path:
    """Write ``data`` as JSON to ``folder / name`` atomically (:func:`gcmc.files.atomic_write`)."""
    final = folder / name
    with atomic_write(final, "w") as fh:
        json.dump(data, fh, indent=1)
    return final


def report_folder(folder: str | Path) -> Path:
    """The report folder, created if needed; InputError when it cannot be made or written."""
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"--report {folder}: cannot create the folder ({exc})") from None
    if not os.access(folder, os.W_OK):
        raise InputError(f"--report {folder}: folder is not writable")
    return folder
