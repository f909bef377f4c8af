"""Assemble a kernel from finished task files: raw points, fits, dense table, provenance."""

from __future__ import annotations

import platform
import socket
import sys
import time
from dataclasses import dataclass

import numpy as np

from gcmc import __version__
from gcmc.kernel.data import POINT_FIELDS, FitRecord, KernelData
from gcmc.pipeline.tasks import BRANCHES, BuildPlan, Task, load_task, task_path


@dataclass
class FitSummary:
    """The chosen fit of one isotherm, for the build's summary."""

    t_index: int
    w_index: int
    form: str
    reduced_chi2: float
    accepted: bool


def _library_versions() -> dict[str, str]:
    out = {"python": sys.version.split()[0]}
    for mod in ("numpy", "scipy", "numba", "h5py", "teqp", "CoolProp", "mpi4py"):
        try:
            m = __import__(mod)
            out[mod] = str(getattr(m, "__version__", "unknown"))
        except Exception:
            out[mod] = "not installed"
    return out


@dataclass
class Layout:
    """Which task files make a kernel: one ladder task per (temperature, width), widths
    sorted, and the point reruns that replace single points of them.

    ``overrides`` maps (t, j, branch, k) to the rerun task whose result replaces point k of
    branch ``branch`` (0 adsorption, 1 desorption) of ladder ``ladders[t][j]``."""

    widths_H_nm: tuple[float, ...]
    ladders: list[list[Task]]
    overrides: dict[tuple[int, int, int, int], Task]

    def tasks(self) -> list[Task]:
        """Every task file the kernel is assembled from."""
        return [t for row in self.ladders for t in row] + list(self.overrides.values())


def grid_layout(plan: BuildPlan) -> Layout:
    """The layout of the config's own grid (no refinement)."""
    nt, nw = len(plan.temperatures), len(plan.config.widths_H_nm)
    by = {(t.t_index, t.w_index): t for t in plan.tasks if not t.is_rerun and t.h_code < 0}
    return Layout(
        widths_H_nm=tuple(float(h) for h in plan.config.widths_H_nm),
        ladders=[[by[(ti, wi)] for wi in range(nw)] for ti in range(nt)],
        overrides={},
    )


def assemble_kernel(
    plan: BuildPlan,
    version: int,
    layout: Layout | None = None,
    extra_provenance: dict | None = None,
) -> tuple[KernelData, list[FitSummary]]:
    """The kernel from the task files of ``layout`` (default: the config's grid), with fits,
    dense table and provenance (``extra_provenance`` is merged into it)."""
    from gcmc.kernel.forms import evaluate_fit
    from gcmc.pipeline.fits import fit_isotherm
    from gcmc.pipeline.heat import heat_kernel

    cfg = plan.config
    layout = layout or grid_layout(plan)
    widths = np.array(layout.widths_H_nm, float)
    nt, nw, n_p = len(plan.temperatures), widths.size, len(cfg.pressures.values)
    branches = BRANCHES if cfg.pressures.descending else BRANCHES[:1]
    points = {b: {f: np.full((nt, nw, n_p), np.nan) for f in POINT_FIELDS} for b in branches}
    flags = {b: np.full((nt, nw, n_p), "", dtype=object) for b in branches}
    henry = np.zeros((nt, nw))
    accessible = np.zeros((nt, nw), dtype=bool)
    seconds = np.zeros((nt, nw))
    seeds = np.zeros((nt, nw, 3), dtype=np.uint64)
    for ti, row in enumerate(layout.ladders):
        for wi, task in enumerate(row):
            arrays, meta = load_task(task_path(plan, task))
            for b in branches:
                for f in POINT_FIELDS:
                    points[b][f][ti, wi] = arrays[f"{b}/{f}"]
                flags[b][ti, wi] = meta["flags"][b]
            henry[ti, wi] = float(arrays["henry_per_nm3_per_pa"])
            accessible[ti, wi] = bool(arrays["accessible"])
            seconds[ti, wi] = float(arrays["seconds"])
            seeds[ti, wi] = (cfg.seed, *task.spawn_key())
    for (ti, wi, bi, k), task in sorted(layout.overrides.items()):
        arrays, meta = load_task(task_path(plan, task))
        b = BRANCHES[bi]
        for f in POINT_FIELDS:
            points[b][f][ti, wi, k] = float(arrays[f"point/{f}"])
        flags[b][ti, wi, k] = meta["flags"]
        seconds[ti, wi] += float(arrays["seconds"])

    for b in branches:
        points[b]["converged"] = points[b]["converged"] == 1.0
    fits: list[list[FitRecord]] = []
    summaries: list[FitSummary] = []
    nd = cfg.fit.dense_points
    dense_p = np.zeros((nt, nd))
    dense_n = np.zeros((nt, nw, nd))
    for ti, tp in enumerate(plan.temperatures):
        p = tp.pressures_Pa
        dense_p[ti] = np.geomspace(p[0] / 100.0, p[-1], nd)
        row = []
        for wi in range(nw):
            n = points["adsorption"]["density_per_nm3"][ti, wi]
            e = points["adsorption"]["density_per_nm3_stderr"][ti, wi]
            res = fit_isotherm(p, n, e, forms=cfg.fit.forms, p_value_min=cfg.fit.p_value_min)
            row.append(res.record())
            summaries.append(FitSummary(ti, wi, res.form, res.reduced_chi2, res.accepted))
            kh = henry[ti, wi] if res.form != "zero" else 0.0
            dense_n[ti, wi] = evaluate_fit(
                res.form,
                res.parameters,
                dense_p[ti],
                p_low=float(p[0]),
                p_high=float(p[-1]),
                above=cfg.fit.above_range,
                below="henry" if kh > 0 else "form",
                henry_constant=kh if kh > 0 else None,
            )
        fits.append(row)

    provenance = {
        "code_version": __version__,
        "libraries": _library_versions(),
        "host": socket.gethostname(),
        "platform": platform.platform(),
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "config_path": str(cfg.path),
        "config_hash": cfg.config_hash,
        "seed": cfg.seed,
        "seed_rule": "numpy SeedSequence(entropy=seed, spawn_key=(t_index, w_index)); point k of "
        "branch b uses child b*P+k of that sequence's spawn(2P)",
        "sampling": cfg.sampling.__dict__,
        "fit": {
            "forms": list(cfg.fit.forms),
            "criterion": "AICc among forms with chi2 p-value >= p_value_min",
            "p_value_min": cfg.fit.p_value_min,
        },
        "below_range": "Henry law with the exact Henry constant: n = K_H p exp(c p), c set "
        "for continuity at the lowest simulated pressure",
    }
    if cfg.target is not None:
        provenance["target"] = cfg.target.to_dict()
    provenance.update(extra_provenance or {})
    sf = cfg.probe
    data = KernelData(
        name=cfg.name,
        version=version,
        probe=sf.to_dict(),
        solid=cfg.solid.to_dict(),
        cutoff_nm=cfg.cutoff_nm,
        box_nm=cfg.box_nm,
        tail_correction="slab (Janecek 2006) beyond r_c" if cfg.sampling.slab_tail else "none",
        eos=cfg.eos,
        eos_parameters=plan.eos_parameters,
        width_convention="internal: w = H - sigma_ss",
        pore_volume_convention="A * w (w = H - sigma_ss)",
        sampler="gcmc-ladder",
        temperatures_K=np.array(cfg.temperatures_K, float),
        widths_H_nm=widths,
        widths_w_nm=widths - cfg.solid.sigma_nm,
        pressures_Pa=np.array([tp.pressures_Pa for tp in plan.temperatures]),
        relative_pressures=np.array([tp.relative_pressures for tp in plan.temperatures]),
        saturation_pressures_Pa=np.array([tp.saturation_pressure_Pa for tp in plan.temperatures]),
        fugacities_Pa=np.array([tp.fugacities_Pa for tp in plan.temperatures]),
        bulk_density_per_nm3=np.array([tp.bulk_density_per_nm3 for tp in plan.temperatures]),
        points=points,
        flags={b: flags[b].astype(str) for b in branches},
        henry_per_nm3_per_pa=henry,
        accessible=accessible,
        fits=fits,
        above_range=cfg.fit.above_range,
        dense_pressures_Pa=dense_p,
        dense_density_per_nm3=dense_n,
        config_text=cfg.text,
        provenance=provenance,
        task_seeds=seeds,
        task_seconds=seconds,
        heat=heat_kernel(
            points["adsorption"]["density_per_nm3"],
            points["adsorption"]["isosteric_heat_kJ_per_mol"],
            points["adsorption"]["isosteric_heat_kJ_per_mol_stderr"],
            accessible,
            points["adsorption"]["density_per_nm3_stderr"],
        ),
    )
    return data, summaries
