"""Project the CPU time of a build from the measured per-point costs of a finished one.

A production kernel (e.g. configs/argon-87K-production.toml: 59 widths x 40 pressures x 2
branches) is too expensive to run just to learn what it costs; a cut-down build of a few widths
on the same pressure grid (configs/argon-87K-micropores-cutdown.toml) is not. This script reads
the cut-down build's task files (first pass and every point rerun of its refinement rounds),
and

1. tabulates the measured CPU seconds per point by regime, from the pore density of the point
   (rho sigma^3: "dilute" < 0.05, "film" < 0.5 = gcmc.sampling.certificate.DENSE_FILLING,
   "filled" above), first pass and reruns apart;
2. projects the target config's first grid: each target point's cost (its first pass plus its
   reruns) interpolated linearly in log(cost) between the measured widths (in H; held
   constant beyond the outermost ones) and between the measured pressures (in ln p/p0), per
   branch.

Per-point CPU seconds: a ladder task records its total CPU time and each point's wall time;
each point's wall time is scaled by the task's CPU / wall ratio (the machine's load), a rerun
task records its own CPU time. Widths that the target's refinement rounds would add are not
projected: they are a multiple of the first grid (+40 % for the shipped methane kernel,
+62 % for CF4; benchmarks/README.md, "Second attempts (v2): results"), stated beside the
figure.

    python benchmarks/project_cost.py configs/argon-87K-micropores-cutdown.toml \\
        configs/argon-87K-production.toml [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from gcmc.pipeline.config import load_config
from gcmc.pipeline.tasks import BRANCHES, load_task, make_plan, task_cpu_seconds
from gcmc.sampling.certificate import DENSE_FILLING

DILUTE = 0.05
EMPTY_ROW = {"points": 0, "first_cpu_s": 0.0, "reruns": 0, "rerun_cpu_s": 0.0}
RERUN_KEY = re.compile(r"^t(\d{3})_w(\d{3})_b(\d)p(\d{3})s(\d+)$")
LADDER_KEY = re.compile(r"^t(\d{3})_w(\d{3})$")


@dataclass
class MeasuredPoints:
    """Per (width, branch, pressure) of the measured build: CPU seconds of the first pass and
    of the reruns, and the first pass's density times sigma^3."""

    widths_H_nm: np.ndarray  # (W,)
    ln_x: np.ndarray  # (P,) ln p/p0
    first_cpu_s: np.ndarray  # (W, B, P)
    rerun_cpu_s: np.ndarray  # (W, B, P)
    reruns: np.ndarray  # (W, B, P) number of rerun tasks
    filling: np.ndarray  # (W, B, P) rho sigma^3


def regime(filling: float) -> str:
    if not np.isfinite(filling) or filling < DILUTE:
        return "dilute"
    return "film" if filling < DENSE_FILLING else "filled"


def read_measured(config: Path) -> MeasuredPoints:
    cfg = load_config(config)
    plan = make_plan(cfg)
    if len(plan.temperatures) != 1:
        raise SystemExit(f"{config}: one temperature expected")
    tp = plan.temperatures[0]
    n_w, n_b, n_p = len(cfg.widths_H_nm), len(BRANCHES), len(tp.pressures_Pa)
    shape = (n_w, n_b, n_p)
    first, rerun = np.full(shape, np.nan), np.zeros(shape)
    count, fill = np.zeros(shape, int), np.full(shape, np.nan)
    s3 = cfg.probe.sigma_nm**3
    files = sorted(plan.task_dir.glob("*.npz"))
    if not files:
        raise SystemExit(f"{plan.task_dir}: no task files (build {config} first)")
    for path in files:
        arrays, _ = load_task(path)
        key = path.stem
        cpu = task_cpu_seconds(arrays)
        if m := LADDER_KEY.match(key):
            w = int(m.group(2))
            scale = cpu / float(arrays["seconds"])
            for b, branch in enumerate(BRANCHES):
                if f"{branch}/seconds" in arrays:
                    first[w, b] = arrays[f"{branch}/seconds"] * scale
                    fill[w, b] = arrays[f"{branch}/density_per_nm3"] * s3
        elif m := RERUN_KEY.match(key):
            w, b, k = int(m.group(2)), int(m.group(3)), int(m.group(4))
            rerun[w, b, k] += cpu
            count[w, b, k] += 1
    return MeasuredPoints(
        np.asarray(cfg.widths_H_nm, float), np.log(tp.relative_pressures), first, rerun, count, fill
    )


def _interp_log(x: np.ndarray, y: np.ndarray, xq: np.ndarray) -> np.ndarray:
    ok = np.isfinite(y) & (y > 0)
    return np.exp(np.interp(xq, x[ok], np.log(y[ok])))


def project(m: MeasuredPoints, config: Path) -> dict:
    cfg = load_config(config)
    plan = make_plan(cfg)
    tp = plan.temperatures[0]
    ln_xq = np.log(tp.relative_pressures)
    branches = 2 if cfg.pressures.descending else 1
    total = m.first_cpu_s + m.rerun_cpu_s
    # per measured width and branch: the cost on the target's pressures
    on_p = np.array(
        [
            [_interp_log(m.ln_x, total[w, b], ln_xq) for b in range(2)]
            for w in range(len(m.widths_H_nm))
        ]
    )
    hq = np.asarray(cfg.widths_H_nm, float)
    cost = np.zeros((hq.size, branches, ln_xq.size))
    for b in range(branches):
        for k in range(ln_xq.size):
            cost[:, b, k] = np.exp(np.interp(hq, m.widths_H_nm, np.log(on_p[:, b, k])))
    return {
        "config": str(config),
        "widths": int(hq.size),
        "points": int(cost.size),
        "cpu_s": float(cost.sum()),
        "cpu_h": float(cost.sum() / 3600),
        "cpu_s_per_point": float(cost.mean()),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("measured", type=Path, help="config of the finished (cut-down) build")
    ap.add_argument("target", type=Path, nargs="*", help="configs to project")
    ap.add_argument("--json", type=Path, help="write the figures as JSON")
    args = ap.parse_args(argv)
    m = read_measured(args.measured)
    rows = {}
    for w in range(m.widths_H_nm.size):
        for b in range(2):
            for k in range(m.ln_x.size):
                r = regime(m.filling[w, b, k])
                d = rows.setdefault(r, dict(EMPTY_ROW))
                if np.isfinite(m.first_cpu_s[w, b, k]):
                    d["points"] += 1
                    d["first_cpu_s"] += float(m.first_cpu_s[w, b, k])
                d["reruns"] += int(m.reruns[w, b, k])
                d["rerun_cpu_s"] += float(m.rerun_cpu_s[w, b, k])
    print(
        f"measured: {args.measured} ({m.widths_H_nm.size} widths, H = "
        f"{', '.join(f'{h:.4g}' for h in m.widths_H_nm)} nm)"
    )
    print(
        "| regime | points | first pass CPU s / point | reruns | rerun CPU s | all CPU s / point |"
    )
    print("|---|---|---|---|---|---|")
    for r in ("dilute", "film", "filled"):
        d = rows.get(r)
        if not d or not d["points"]:
            continue
        n = d["points"]
        print(
            f"| {r} | {n} | {d['first_cpu_s'] / n:.3g} | {d['reruns']} | "
            f"{d['rerun_cpu_s']:.4g} | {(d['first_cpu_s'] + d['rerun_cpu_s']) / n:.3g} |"
        )
    allc = float(np.nansum(m.first_cpu_s) + m.rerun_cpu_s.sum())
    print(f"measured in all: {allc:.0f} CPU s ({allc / 3600:.2f} CPU h)")
    projections = [project(m, t) for t in args.target]
    for p in projections:
        print(
            f"projected {p['config']}: {p['widths']} widths, {p['points']} points, "
            f"{p['cpu_h']:.2f} CPU h ({p['cpu_s_per_point']:.3g} CPU s per point), first grid "
            "only (refinement rounds add widths)"
        )
    if args.json:
        args.json.write_text(
            json.dumps(
                {"regimes": rows, "measured_cpu_s": allc, "projections": projections}, indent=1
            )
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
