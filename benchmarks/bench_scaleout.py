"""Scale-out of `gcmc build` on one machine: wall time with 1 and 2 local workers, and the
peak memory of the processes that run tasks.

The grid is 8 tasks (methane at 298.15 K, H = 1.0 - 1.7 nm, 8 pressures each) of a similar
cost, ~41 s each on one core (two replicas per point, the default), so that what is measured
is the parallel machinery (spawning workers, each loading the numba cache, the task queue,
the assembly) and not the balance of unequal tasks; the balance is the subject of
schedule_replay.py. Every number is end-to-end: `python -m gcmc.cli build` from start to
exit, imports and writing included.

Memory: the process tree of the build is sampled every 0.2 s; for every process that runs
tasks (the build itself with 1 worker, the pool workers with 2) it reports the peak resident
set (VmHWM of /proc/PID/status, the kernel's own high-water mark) and the resident set when
its first task was finished and at its last sample (flat = no growth from task to task).
getrusage(RUSAGE_CHILDREN).ru_maxrss, the largest peak of any finished descendant, is
reported as a cross-check.

The machine may be shared: before each run the script waits (up to 30 min) until other
processes use less than 0.15 core, and it reports the cores they used during each run
(machine-wide busy time from /proc/stat minus the build's own CPU time).

    python benchmarks/bench_scaleout.py            # ~9 minutes on 2 idle cores
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
#: before each run, wait at most this long for the machine to be idle (it may be shared)
WAIT_S = 1800.0
WORK = REPO / "runs" / "bench-scaleout"

CONFIG = """\
# benchmarks/bench_scaleout.py: 8 tasks of similar cost.
seed = 3

[kernel]
name = "scaleout-methane"
output = "out"

[probe]
library_name = "methane"

[widths]
ranges = [{{ from_nm = 1.00, to_nm = 1.70, step_nm = 0.10 }}]

[temperatures]
K = [298.15]

[pressures]
from_Pa = 1.0e4
to_Pa = 3.5e6
count = 8

[sampling]
equilibration_moves = {eq}
production_moves = {prod}
sample_every = 100
"""


@dataclass
class ProcMemory:
    cmd: str
    peak_kb: int = 0
    rss_kb: list[tuple[float, int]] = field(default_factory=list)


def _status(pid: int) -> dict[str, int] | None:
    try:
        text = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return None
    out = {}
    for line in text.splitlines():
        key, _, val = line.partition(":")
        if key in ("VmHWM", "VmRSS", "PPid"):
            out[key] = int(val.split()[0])
    return out


def _tree(root: int) -> list[int]:
    kids: dict[int, list[int]] = {}
    for e in Path("/proc").iterdir():
        if e.name.isdigit():
            st = _status(int(e.name))
            if st and "PPid" in st:
                kids.setdefault(st["PPid"], []).append(int(e.name))
    out, todo = [], [root]
    while todo:
        p = todo.pop()
        out.append(p)
        todo.extend(kids.get(p, []))
    return out


def _cpu_busy_s() -> float:
    """Machine-wide busy CPU seconds so far (all cores, all processes), from /proc/stat."""
    f = [int(x) for x in Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:]]
    idle = f[3] + f[4]  # idle + iowait
    return (sum(f[:8]) - idle) / os.sysconf("SC_CLK_TCK")


def wait_until_idle(max_wait_s: float) -> float:
    """Wait until other processes use less than 0.15 core over 10 s; returns what they used."""
    deadline = time.monotonic() + max_wait_s
    while True:
        b0 = _cpu_busy_s()
        time.sleep(10)
        used = (_cpu_busy_s() - b0) / 10
        if used < 0.15 or time.monotonic() > deadline:
            return used
        print(f"waiting for an idle machine (others use {used:.2f} cores) ...", flush=True)


def _cmdline(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode().strip()
    except OSError:
        return "?"


def run_build(workers: int, eq: int, prod: int) -> dict:
    folder = WORK / f"workers-{workers}"
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    cfg = folder / "scaleout.toml"
    cfg.write_text(CONFIG.format(eq=eq, prod=prod))
    idle_before = wait_until_idle(WAIT_S)
    cmd = [
        sys.executable,
        "-m",
        "gcmc.cli",
        "build",
        str(cfg),
        "--workers",
        str(workers),
        "--no-progress",
    ]
    ru0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    busy0 = _cpu_busy_s()
    t0 = time.perf_counter()
    proc = subprocess.Popen(
        cmd, cwd=folder, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )
    mem: dict[int, ProcMemory] = {}
    first_task_at: float | None = None
    tasks = folder / "out" / "scaleout-methane.tasks"
    while proc.poll() is None:
        now = time.perf_counter() - t0
        if first_task_at is None and any(tasks.glob("*/t*.npz")):
            first_task_at = now
        for pid in _tree(proc.pid):
            st = _status(pid)
            if not st or "VmHWM" not in st:
                continue
            m = mem.setdefault(pid, ProcMemory(_cmdline(pid)))
            m.peak_kb = max(m.peak_kb, st["VmHWM"])
            m.rss_kb.append((now, st["VmRSS"]))
        time.sleep(0.2)
    out, err = proc.communicate()
    wall = time.perf_counter() - t0
    ru1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (ru1.ru_utime + ru1.ru_stime) - (ru0.ru_utime + ru0.ru_stime)
    others = max(0.0, _cpu_busy_s() - busy0 - cpu) / wall  # cores used by other processes
    if proc.returncode != 0:
        raise SystemExit(f"build failed:\n{out}\n{err}")
    from gcmc.kernel.reader import open_kernel

    kernel = next((folder / "out").glob("scaleout-methane.v*.h5"))
    data = open_kernel(kernel).data
    # processes that ran tasks: the build itself (1 worker) or the spawned pool workers
    if workers == 1:
        runners = {proc.pid: mem[proc.pid]}
    else:
        runners = {p: m for p, m in mem.items() if "spawn_main" in m.cmd}
    return {
        "workers": workers,
        "wall_s": wall,
        "cpu_s": cpu,
        "others": others,
        "idle_before": idle_before,
        "data": data,
        "task_s": float(np.sum(data.task_seconds)),
        "max_task_s": float(np.max(data.task_seconds)),
        "task_phase_s": _task_phase(tasks),
        "runners": runners,
        "first_task_at": first_task_at,
        "build_peak_kb": mem[proc.pid].peak_kb,
    }


def _task_phase(task_root: Path) -> float:
    """Wall time from the first task's start to the last task's end: a task file's mtime is
    its end, minus its measured seconds its start."""
    from gcmc.pipeline.tasks import load_task

    spans = []
    for f in task_root.glob("*/t*.npz"):
        arrays, _ = load_task(f)
        end = f.stat().st_mtime
        spans.append((end - float(arrays["seconds"]), end))
    return max(e for _, e in spans) - min(b for b, _ in spans)


def _flat(m: ProcMemory, after: float | None) -> tuple[float, float]:
    """RSS (MB) at the first sample after ``after`` (the first task done) and at the last."""
    later = [r for t, r in m.rss_kb if after is None or t >= after] or [m.rss_kb[-1][1]]
    return later[0] / 1024, m.rss_kb[-1][1] / 1024


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument(
        "--production-moves",
        type=int,
        default=3_000_000,
        help="per point (default 3000000: ~12 s per task on one core)",
    )
    args = ap.parse_args(argv)
    prod = args.production_moves
    eq = prod // 4
    results = [run_build(w, eq, prod) for w in (1, 2)]
    one, two = results
    same = all(
        np.array_equal(
            one["data"].points["adsorption"][f], two["data"].points["adsorption"][f], equal_nan=True
        )
        for f in ("density_per_nm3", "density_per_nm3_stderr", "molecules_mean")
    )
    print(f"8 tasks, {eq} + {prod} moves per point, 8 points per task; cpu count {os.cpu_count()}")
    print(
        "| workers | wall time (s) | CPU time, all processes (s) | cores obtained | "
        "task phase (s) | outside tasks (s) | time in tasks (s) | longest task (s) | "
        "cores used by others |"
    )
    print("|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
    for r in results:
        print(
            f"| {r['workers']} | {r['wall_s']:.1f} | {r['cpu_s']:.1f} | "
            f"{r['cpu_s'] / r['wall_s']:.2f} | {r['task_phase_s']:.1f} | "
            f"{r['wall_s'] - r['task_phase_s']:.1f} | {r['task_s']:.1f} | {r['max_task_s']:.1f} | "
            f"{r['others']:.2f} |"
        )
    print(
        f"\nspeed-up 1 -> 2 workers: {one['wall_s'] / two['wall_s']:.2f}x end to end (target "
        f">= 1.8x), {one['task_phase_s'] / two['task_phase_s']:.2f}x in the task phase; "
        f"time in tasks, 2 vs 1 workers: {two['task_s'] / one['task_s']:.2f}x (above 1: two "
        f"busy workers slow each other down); kernels identical (densities, errors, N): {same}"
    )
    if max(one["others"], two["others"]) > 0.1:
        print(
            "WARNING: other processes used CPU during the runs (last column): the wall times "
            "are not the build's alone. Rerun on an idle machine."
        )
    print("\nmemory of the processes that ran tasks (MB):")
    print("| workers | process | peak RSS (VmHWM) | RSS after first task | RSS at end |")
    print("|---:|---|---:|---:|---:|")
    for r in results:
        for pid, m in r["runners"].items():
            a, b = _flat(m, r["first_task_at"])
            role = "build (in-process)" if r["workers"] == 1 else f"pool worker {pid}"
            print(f"| {r['workers']} | {role} | {m.peak_kb / 1024:.0f} | {a:.0f} | {b:.0f} |")
    print(
        f"\nbuild process peak with 2 workers (queue, assembly, HDF5 writing): "
        f"{two['build_peak_kb'] / 1024:.0f} MB"
    )
    ru = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"getrusage(RUSAGE_CHILDREN).ru_maxrss (largest finished descendant): {ru:.0f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
