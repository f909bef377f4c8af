"""Replay measured task costs through the build scheduler's policy, for 1 to 1024 ranks.

The scheduler (gcmc/pipeline/runner.py) hands tasks out one at a time, as ranks become free, in the
order of gcmc.pipeline.tasks: most expensive first, by the a-priori cost model on a first build and
by
the measured costs of finished tasks on a resumed one (``learned_order``). This script
simulates that with a heap of rank-free times (list scheduling) and reports the parallel
efficiency

    efficiency = total task cost / (ranks x makespan)

for three policies:

* ``measured-first``: dynamic hand-out, tasks sorted by their true cost (the learned order;
  the best this scheduler can do: longest-processing-time-first list scheduling);
* ``estimate-first``: dynamic hand-out, sorted by the a-priori cost model of gcmc.pipeline.tasks
(what
  a first build does; the model's order is the build's own, computed by
  gcmc.pipeline.tasks.make_plan);
* ``static-split``: the naive alternative, tasks in grid order cut into equal contiguous
  blocks, one per rank.

Costs: the measured task_seconds of a real kernel (default: build the small methane kernel
below once into runs/schedule-replay/). A real kernel has few tasks (one per temperature and
width), so for larger grids the costs are synthesised from it: each synthetic width gets the
measured cost interpolated in log(cost) against H between the measured widths, times a
multiplicative scatter resampled from the measured tasks' residuals about that interpolation
(leave-one-out); temperatures repeat the width profile with fresh scatter (the cost's
temperature dependence is not modelled). The a-priori estimate (gcmc.pipeline.cost) of a synthetic
width is interpolated in log(estimate) against H between the measured widths, like the cost.
Start-up (imports, the numba cache, the EOS) and the final assembly are not part of the
replay: they are measured by bench_scaleout.py.

    python benchmarks/schedule_replay.py                  # build the replay kernel if needed
    python benchmarks/schedule_replay.py --case argon     # the argon 87 K replay kernel
    python benchmarks/schedule_replay.py runs/x/k.v1.h5   # replay another kernel's costs
"""

from __future__ import annotations

import argparse
import heapq
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
WORK = REPO / "runs" / "schedule-replay"
RANKS = (1, 2, 4, 8, 16, 32, 64, 128, 256, 512, 1024)

#: The kernel whose task costs are replayed by default: methane at 298.15 K over the whole
#: micropore range, so that the costs span what the widths make them span (narrow pores with
#: biased insertion are several times dearer than wide ones here).
REPLAY_CONFIG = """\
# Task costs for benchmarks/schedule_replay.py: methane 298.15 K, H = 0.7 - 2.0 nm.
seed = 11

[kernel]
name = "replay-methane"
output = "out"

[probe]
library_name = "methane"

[widths]
ranges = [{ from_nm = 0.70, to_nm = 2.00, step_nm = 0.10 }]

[temperatures]
K = [298.15]

[pressures]
from_Pa = 1.0e3
to_Pa = 3.5e6
count = 8

[sampling]
equilibration_moves = 100000
production_moves = 400000
sample_every = 20
"""


def list_schedule(costs: np.ndarray, ranks: int) -> float:
    """Makespan when tasks are handed out in this order to whichever rank is free first."""
    free = [0.0] * min(ranks, len(costs))
    heapq.heapify(free)
    for c in costs:
        heapq.heappush(free, heapq.heappop(free) + float(c))
    return max(free)


def static_split(costs_in_grid_order: np.ndarray, ranks: int) -> float:
    """Makespan of contiguous, equal-count blocks of the grid, one per rank."""
    return max(float(b.sum()) for b in np.array_split(costs_in_grid_order, ranks) if len(b))


def efficiencies(cost: np.ndarray, estimate: np.ndarray, ranks: int) -> dict[str, float]:
    """cost, estimate: per task, in grid order (temperature-major, then width)."""
    total = float(cost.sum())
    by_cost = cost[np.argsort(-cost, kind="stable")]
    by_est = cost[np.argsort(-estimate, kind="stable")]
    return {
        "measured-first": total / (ranks * list_schedule(by_cost, ranks)),
        "estimate-first": total / (ranks * list_schedule(by_est, ranks)),
        "static-split": total / (ranks * static_split(cost, ranks)),
    }


def measured_costs(kernel: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(H per task, measured seconds, a-priori estimate) of every task of a kernel, in grid
    order. The estimate comes from gcmc.pipeline.tasks.make_plan on the kernel's own config text."""
    from gcmc.kernel.reader import open_kernel
    from gcmc.pipeline.config import parse_config
    from gcmc.pipeline.tasks import make_plan

    data = open_kernel(kernel).data
    cfg = parse_config(tomllib.loads(data.config_text), data.config_text, kernel)
    est = {(t.t_index, t.w_index): t.estimated_cost for t in make_plan(cfg).tasks}
    nt, nw = data.task_seconds.shape
    h = np.array([data.widths_H_nm[w] for t in range(nt) for w in range(nw)])
    sec = np.array([data.task_seconds[t, w] for t in range(nt) for w in range(nw)])
    e = np.array([est[(t, w)] for t in range(nt) for w in range(nw)])
    return h, sec, e


def synthesise(
    h: np.ndarray, sec: np.ndarray, est: np.ndarray, n_t: int, n_w: int, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """Costs and estimates of an n_t x n_w grid (grid order) shaped like the measured one."""
    order = np.argsort(h)
    h, ls, est = h[order], np.log(sec[order]), est[order]
    # leave-one-out residuals of log(cost) about the interpolation between neighbours
    resid = np.array(
        [ls[i] - np.interp(h[i], np.delete(h, i), np.delete(ls, i)) for i in range(1, len(h) - 1)]
    )
    hs = np.linspace(h[0], h[-1], n_w)
    base = np.interp(hs, h, ls)
    cost = np.concatenate([np.exp(base + rng.choice(resid, n_w)) for _ in range(n_t)])
    estimate = np.tile(np.exp(np.interp(hs, h, np.log(np.maximum(est, 1e-300)))), n_t)
    return cost, estimate


#: A second, subcritical case: argon at 87.3 K over the micropore range, where films and
#: pore filling decide which points run biased insertion.
REPLAY_CONFIG_ARGON = """\
# Task costs for benchmarks/schedule_replay.py: argon 87.3 K, H = 0.7 - 3.4 nm.
seed = 12

[kernel]
name = "replay-argon"
output = "out"

[probe]
library_name = "argon"

[widths]
ranges = [{ from_nm = 0.70, to_nm = 3.40, step_nm = 0.15 }]

[temperatures]
K = [87.3]

[pressures]
from_p_p0 = 1.0e-6
to_p_p0 = 0.95
count = 8

[sampling]
equilibration_moves = 20000
production_moves = 80000
sample_every = 20
"""

CASES = {
    "methane": ("replay-methane", REPLAY_CONFIG, WORK),
    "argon": ("replay-argon", REPLAY_CONFIG_ARGON, REPO / "runs" / "replay-argon"),
}


def ensure_replay_kernel(case: str = "methane") -> Path:
    name, text, work = CASES[case]
    found = sorted((work / "out").glob(f"{name}.v*.h5"))
    if found:
        return found[-1]
    work.mkdir(parents=True, exist_ok=True)
    cfg = work / "replay.toml"
    cfg.write_text(text)
    # one worker: a task's measured cost is then its own, not shared with a second worker
    print(f"building the replay kernel once, 1 worker ({cfg}) ...", flush=True)
    cmd = [
        sys.executable,
        "-m",
        "gcmc.cli",
        "build",
        str(cfg),
        "--no-progress",
        "--workers",
        "1",
    ]
    subprocess.run(cmd, check=True, cwd=REPO)
    return sorted((work / "out").glob(f"{name}.v*.h5"))[-1]


def table(title: str, cost: np.ndarray, estimate: np.ndarray) -> str:
    """Efficiency per policy, and the bound no policy can beat: the makespan is at least the
    longest task and at least total / ranks."""
    total = float(cost.sum())
    lines = [
        f"**{title}**: {len(cost)} tasks, total {total:.1f} s, "
        f"longest / mean task {cost.max() / cost.mean():.2f}",
        "",
        "| ranks | tasks/rank | measured-first | estimate-first | static-split | bound |",
        "|---:|---:|---:|---:|---:|---:|",
    ]
    for r in RANKS:
        e = efficiencies(cost, estimate, r)
        bound = total / (r * max(float(cost.max()), total / r))
        lines.append(
            f"| {r} | {len(cost) / r:.4g} | {e['measured-first']:.1%} | "
            f"{e['estimate-first']:.1%} | {e['static-split']:.1%} | {bound:.1%} |"
        )
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("kernel", nargs="?", help="kernel file whose task_seconds are replayed")
    ap.add_argument(
        "--grid",
        default="16x256",
        help="synthetic grid, temperatures x widths (default 16x256 = 4096 tasks)",
    )
    ap.add_argument("--seed", type=int, default=1, help="seed of the resampled scatter")
    ap.add_argument(
        "--case",
        choices=sorted(CASES),
        default="methane",
        help="built-in replay kernel when no kernel file is given",
    )
    args = ap.parse_args(argv)
    kernel = Path(args.kernel) if args.kernel else ensure_replay_kernel(args.case)
    h, sec, est = measured_costs(kernel)
    n_t, n_w = (int(x) for x in args.grid.lower().split("x"))
    rank_corr = float(np.corrcoef(np.argsort(np.argsort(sec)), np.argsort(np.argsort(est)))[0, 1])
    print(
        f"kernel {kernel}: {len(sec)} tasks, measured cost {sec.min():.2f} - {sec.max():.2f} s "
        f"(H {h.min():g} - {h.max():g} nm); rank correlation of the a-priori estimate with "
        f"the measured cost: {rank_corr:+.2f}\n"
    )
    print(table("measured tasks of the kernel", sec, est), "\n")
    rng = np.random.default_rng(args.seed)
    cost, estimate = synthesise(h, sec, est, n_t, n_w, rng)
    print(table(f"synthetic {n_t} x {n_w} grid resampled from it", cost, estimate), "\n")
    # The production argon example has one task per width: 59 tasks (configs/).
    cost59, est59 = synthesise(h, sec, est, 1, 59, rng)
    print(
        table(
            "synthetic 1 x 59 grid (one temperature, 59 widths: the size of "
            "configs/argon-87K-production.toml)",
            cost59,
            est59,
        )
    )
    at4 = [r for r in RANKS if n_t * n_w / r >= 4]
    rows = []
    for r in at4:
        e = efficiencies(cost, estimate, r)
        bound = cost.sum() / (r * max(cost.max(), cost.sum() / r))
        rows.append((e["measured-first"], e["estimate-first"], bound, r))
    worst = min(rows)
    worst_est = min(rows, key=lambda x: x[1])
    print(
        f"\n>= 4 tasks per rank ({at4[0]} - {at4[-1]} ranks), target >= 90 %: measured-first "
        f"worst {worst[0]:.1%} at {worst[3]} ranks (no order beats {worst[2]:.1%} there)"
        f"; estimate-first worst {worst_est[1]:.1%} at {worst_est[3]} ranks"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
