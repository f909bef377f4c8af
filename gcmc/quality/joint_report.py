"""The report page of a set check (``gcmc check K1 K2 ... --report DIR``): PNG and PDF of each
figure and ``set-check.json``, written with the machinery of :mod:`gcmc.quality.report` (Agg
canvas, atomic files).

* ``set-gain``: the gain of the set over its members. Top: the two-pore half-separation
  relative to the width, dw_2 / w, of the set and of each member alone against w, with the
  resolved line rho and the resolved intervals (the set's shaded, each member's as a bar).
  Bottom: the gain min_m dw_2,m / dw_2,set per width, the widths that only the set resolves
  marked.
* ``set-round-trip``: per synthetic PSD, the true PSD, the joint recovery (median and 16-84 %
  band) and each member's recovery alone (median).
* ``set-singular-values``: the spectrum of the stacked noise-weighted matrix against each
  member's.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.ticker import MaxNLocator

from gcmc.quality.joint import JointResolution, JointRoundTrip, SetReport
from gcmc.quality.report import new_figure, report_folder, save_figure, write_json

_SET_COLOUR = "#0969da"
_MEMBER_COLOURS = ("#cf222e", "#8250df", "#1a7f37", "#bc4c00", "#57606a", "#b08800")
_VERDICT_COLOUR = {"pass": "#1a7f37", "info": "#57606a", "warn": "#b08800", "fail": "#cf222e"}


def _colour(i: int) -> str:
    return _MEMBER_COLOURS[i % len(_MEMBER_COLOURS)]


def plot_gain(ax_top, ax_bottom, jr: JointResolution) -> None:
    """The two panels of ``set-gain`` (module docstring)."""
    s = jr.set
    w = s.widths_w_nm
    rho = jr.resolution_fraction
    with np.errstate(divide="ignore", invalid="ignore"):
        for i, r in enumerate(jr.members):
            y = r.pair_half_separation_nm / w
            ax_top.plot(
                w,
                np.where(np.isfinite(y), y, np.nan),
                "-",
                lw=1.0,
                color=_colour(i),
                label=f"{r.labels[0]} alone",
            )
        ax_top.plot(
            w,
            s.pair_half_separation_nm / w,
            "o-",
            ms=2.5,
            lw=1.8,
            color=_SET_COLOUR,
            label="the set",
        )
    ax_top.axhline(rho, color="k", ls=":", lw=1.0, label=f"resolved: $\\delta w_2 \\leq$ {rho:g} w")
    for a, b in s.intervals_w_nm:
        ax_top.axvspan(a, b, color=_SET_COLOUR, alpha=0.07)
    y0 = 0.95
    for i, r in enumerate(jr.members):
        for a, b in r.intervals_w_nm:
            ax_top.plot(
                [a, b],
                [y0 - 0.035 * i] * 2,
                "-",
                lw=3,
                color=_colour(i),
                transform=ax_top.get_xaxis_transform(),
                solid_capstyle="butt",
            )
    ax_top.text(
        w[0],
        y0 + 0.03,
        " resolved alone (bars), by the set (shaded)",
        fontsize=6,
        transform=ax_top.get_xaxis_transform(),
        va="bottom",
    )
    ax_top.set_yscale("log")
    finite = (
        s.pair_half_separation_nm[np.isfinite(s.pair_half_separation_nm)]
        / w[np.isfinite(s.pair_half_separation_nm)]
    )
    low = float(np.min(finite)) if finite.size else rho / 10
    ax_top.set_ylim(min(low, rho) / 2.0, 50.0 * rho)
    ax_top.set_ylabel("$\\delta w_2 / w$ (two-pore half-separation)")
    ax_top.set_title(
        f"resolving power: the set resolves {s.resolved_span_nm:.3g} nm of widths, the best "
        f"member alone {max((r.resolved_span_nm for r in jr.members), default=0.0):.3g} nm",
        fontsize=9,
    )
    ax_top.legend(fontsize=7, loc="center left")
    g = jr.gain
    ax_bottom.plot(w, np.where(np.isfinite(g), g, np.nan), "o-", ms=2.5, color=_SET_COLOUR)
    ax_bottom.axhline(1.0, color="k", lw=0.8, ls=":")
    only = jr.only_set
    if only.size:
        idx = np.searchsorted(w, only)
        ax_bottom.plot(only, g[idx], "*", ms=8, color="#cf222e", label="resolved only by the set")
        ax_bottom.legend(fontsize=7, loc="upper right")
    ax_bottom.set_yscale("log")
    ax_bottom.set_xlabel("pore width w (nm)")
    ax_bottom.set_ylabel("gain: best member $\\delta w_2$ / set $\\delta w_2$")


def plot_joint_round_trip(ax, rt: JointRoundTrip) -> None:
    """One PSD: true, joint (median and band), each member alone (median)."""
    med, lo, hi = rt.joint.band()
    ax.fill_between(rt.widths_nm, lo, hi, color=_SET_COLOUR, alpha=0.2, lw=0)
    ax.plot(rt.widths_nm, med, "-", color=_SET_COLOUR, lw=1.6, label="the set (median)")
    for i, rec in enumerate(rt.members):
        m, _, _ = rec.band()
        ax.plot(
            rt.widths_nm,
            m,
            "-",
            lw=0.9,
            color=_colour(i),
            alpha=0.9,
            label=f"{rec.label} alone ({rec.verdict})",
        )
    ax.plot(rt.widths_nm, rt.true_psd, "k--", lw=1.0, label="synthetic")
    state = rt.verdict if rt.resolvable else "not resolvable"
    ax.set_title(
        f"{rt.psd.name}: set {state}", fontsize=8, color=_VERDICT_COLOUR.get(rt.verdict, "#57606a")
    )
    ax.set_xlabel("pore width w (nm)")
    ax.set_ylabel("PSD (cm$^3$/g/nm)")
    ax.legend(fontsize=6, loc="upper right")


def plot_set_singular_values(ax, jr: JointResolution) -> None:
    """Singular values of the stacked matrix and of each member's."""
    for i, r in enumerate(jr.members):
        k = np.arange(1, r.singular_values.size + 1)
        ax.semilogy(
            k,
            np.where(r.singular_values > 0, r.singular_values, np.nan),
            "-",
            lw=1.0,
            color=_colour(i),
            label=f"{r.labels[0]} ({r.n_significant} >= 1)",
        )
    s = jr.set.singular_values
    ax.semilogy(
        np.arange(1, s.size + 1),
        np.where(s > 0, s, np.nan),
        "o-",
        ms=3,
        color=_SET_COLOUR,
        label=f"the set ({jr.set.n_significant} >= 1)",
    )
    ax.axhline(1.0, color="k", lw=0.8, ls=":")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("index")
    ax.set_ylabel("singular value (noise units per unit pore volume)")
    ax.set_title("noise-weighted kernel matrices, stacked and alone", fontsize=9)
    ax.legend(fontsize=7)


def gain_figure(report: SetReport):
    """The ``set-gain`` figure (a matplotlib Figure)."""
    fig = new_figure(7.2, 6.4)
    grid = fig.add_gridspec(2, 1, height_ratios=(3, 2))
    top = fig.add_subplot(grid[0])
    bottom = fig.add_subplot(grid[1], sharex=top)
    plot_gain(top, bottom, report.resolution)
    distinct = len(report.resolution.members)
    fig.suptitle(
        f"gcmc check, a set of {len(report.members)} ({distinct} distinct isotherms): verdict "
        f"{report.verdict.upper()}",
        color=_VERDICT_COLOUR[report.verdict],
        fontsize=10,
    )
    return fig


def write_set_report(report: SetReport, folder: str | Path) -> list[Path]:
    """Write the figures (PNG and PDF) and set-check.json into ``folder``; return the paths."""
    folder = report_folder(folder)
    out: list[Path] = []
    out += save_figure(gain_figure(report), folder, "set-gain")
    if report.round_trips:
        n = len(report.round_trips)
        fig = new_figure(4.2 * n, 3.8)
        for i, rt in enumerate(report.round_trips):
            plot_joint_round_trip(fig.add_subplot(1, n, i + 1), rt)
        out += save_figure(fig, folder, "set-round-trip")
    fig = new_figure(6.4, 4.4)
    plot_set_singular_values(fig.add_subplot(), report.resolution)
    out += save_figure(fig, folder, "set-singular-values")
    out.append(write_json(report.to_dict(), folder, "set-check.json"))
    return out


__all__ = [
    "gain_figure",
    "plot_gain",
    "plot_joint_round_trip",
    "plot_set_singular_values",
    "write_set_report",
]
