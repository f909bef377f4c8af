"""Fixed grid against refined grid: the same run config built once exactly as written
(``[target] refine = false``) and once refining itself towards its target, with
``gcmc check`` run on both against the target.

Reported per build: widths, CPU seconds in the task files (the worker's process time; the
refined build reuses the fixed build's first-pass task files, which it would have computed
anyway, and counts them), wall time of the build call, the check's verdict and the criteria
that do not pass, the worst mid-interval interpolation error in width (the check's
``width_gaps``, x tolerance) and the worst point error.

    python3 benchmarks/bench_refine.py [CONFIG] [--out DIR] [--workers N]

CONFIG defaults to configs/quickstart.toml; its [target] table is used for both builds.
Builds go into DIR (default: a temporary folder), not into the config's output folder.
"""

from __future__ import annotations

import argparse
import re
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))


def _variant(text: str, out: Path, refine: bool) -> str:
    text = re.sub(r"(?m)^output = .*$", f'output = "{out.as_posix()}"', text)
    if not re.search(r"(?m)^\[target\]$", text):
        text += "\n[target]\n"
    flag = "true" if refine else "false"
    return re.sub(r"(?m)^\[target\]$", f"[target]\nrefine = {flag}", text, count=1)


def _cpu_seconds(result) -> float:  # noqa: ANN001
    """CPU seconds of the first pass: the plan's own task files (the task folder may also
    hold the refined build's files, which it shares)."""
    from gcmc.pipeline.tasks import load_task, task_cpu_seconds, task_path

    total = 0.0
    for t in result.plan.tasks:
        arrays, _ = load_task(task_path(result.plan, t))
        total += task_cpu_seconds(arrays)
    return total


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("config", nargs="?", default=str(REPO / "configs" / "quickstart.toml"))
    ap.add_argument("--out", default=None)
    ap.add_argument("--workers", type=int, default=0)
    args = ap.parse_args()

    from gcmc.kernel.reader import open_kernel
    from gcmc.pipeline.build import build_kernel
    from gcmc.quality.criteria import run_checks
    from gcmc.quality.target import check_settings

    src = Path(args.config)
    out = Path(args.out) if args.out else Path(tempfile.mkdtemp(prefix="bench_refine_"))
    rows = []
    cpu_fixed = 0.0
    for refine in (False, True):
        cfg_path = out / f"{src.stem}-{'refined' if refine else 'fixed'}.toml"
        cfg_path.parent.mkdir(parents=True, exist_ok=True)
        cfg_path.write_text(_variant(src.read_text(), out / "runs", refine))
        t0 = time.perf_counter()
        res = build_kernel(cfg_path, workers=args.workers, progress=True)
        wall = time.perf_counter() - t0
        if refine:  # it reused the fixed build's first pass: count that pass's wall time too
            wall += rows[0]["wall_s"]
        if not res.ok:
            print(f"build {cfg_path.name}: {res.status}", file=sys.stderr)
            return 1
        k = open_kernel(res.path)
        rep = run_checks(k, check_settings(res.config.target))
        gaps = rep.criterion("width_gaps")
        worst_gap = max(
            (r["interpolation_error_over_tolerance"] for r in gaps.data["intervals"]),
            default=0.0,
        )
        cpu_all = _cpu_seconds(res)
        if not refine:
            cpu_fixed = cpu_all
        ref = k.data.provenance.get("refinement", {})
        cpu = float(ref.get("cpu_seconds", cpu_fixed)) if refine else cpu_fixed
        rows.append(
            {
                "build": "refined" if refine else "fixed grid",
                "widths": len(k.data.widths_H_nm),
                "rounds": len(ref.get("rounds", [])),
                "cpu_s": cpu,
                "wall_s": wall,
                "verdict": rep.verdict,
                "not_pass": ", ".join(
                    f"{c.key} {c.verdict}" for c in rep.criteria if c.verdict in ("warn", "fail")
                )
                or "-",
                "worst_gap": worst_gap,
                "worst_err": rep.criterion("point_errors").data["worst"],
                "stop": ref.get("stop", "-"),
            }
        )
    print(f"config {src} (builds in {out})")
    head = f"{'build':<11} {'widths':>6} {'rounds':>6} {'CPU s':>8} {'wall s':>8} {'verdict':>7}"
    head += f" {'gap/tol':>8} {'err':>7}  not passing / stop"
    print(head)
    for r in rows:
        print(
            f"{r['build']:<11} {r['widths']:>6} {r['rounds']:>6} {r['cpu_s']:>8.0f} "
            f"{r['wall_s']:>8.0f} {r['verdict']:>7} {r['worst_gap']:>8.2f} "
            f"{r['worst_err']:>7.3g}  {r['not_pass']}; {r['stop']}"
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
