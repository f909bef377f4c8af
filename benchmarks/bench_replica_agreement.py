"""Replica agreement inside builds: the distribution of replica_agreement_z over build points.

Each point of a build runs two replicas (one from the previous, lower-pressure state of the
ladder, one over-filled first); where their error bars are honest and both sample the same
ensemble, z = (mean_1 - mean_0) / sqrt(err_0^2 + err_1^2) is close to N(0, 1). The script
builds the task files of the quickstart ladder (methane 298.15 K, its widths and pressures)
through the build's own task runner (gcmc.pipeline.tasks.run_task) for several seeds, with
fewer moves than the quickstart to keep CPU modest, and reports the distribution of z: mean,
standard deviation, fraction beyond |z| = 3 and the Kolmogorov-Smirnov p-value against N(0, 1).

Before/after a change of the sampler: run the script once with PYTHONPATH pointing at each
version of the code (e.g. an exported older commit) with ``--json``, then ``--compare A B``.

The script also records, per point, each replica's insertion method (k trial positions) and
equilibration cut, read from the replica runs the point analysis receives (a wrapper around
gcmc.sampling.point._analyse; it changes nothing), so that the points can be split by whether
the two replicas sampled with the same insertion method.

Run: ``NUMBA_NUM_THREADS=1 python benchmarks/bench_replica_agreement.py --seeds 5
--json out.json`` (about 300 points; a few minutes of CPU per seed on one core).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
import time
import tomllib
from collections.abc import Callable
from pathlib import Path

os.environ.setdefault("NUMBA_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from scipy import stats  # noqa: E402

import gcmc.sampling.point as point_mod  # noqa: E402
from gcmc.pipeline.config import parse_config  # noqa: E402
from gcmc.pipeline.tasks import make_plan, run_task, task_path  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
QUICKSTART = ROOT / "configs" / "quickstart.toml"


def _capture() -> list[dict]:
    """Wrap the point analysis to record per-replica facts of every point (read only)."""
    seen: list[dict] = []
    original = point_mod._analyse

    def wrapped(model, state, settings, runs):  # noqa: ANN001, ANN202
        out = original(model, state, settings, runs)
        seen.append(
            {
                "width_nm": float(model.width_nm),
                "pressure_Pa": float(state.pressure_Pa),
                "k_trials": [int(r.k_trials) for r in runs],
                "cut_samples": [int(r.t0) for r in runs],
                "start_n": [int(r.start_n) for r in runs],
                "means": [float(m) for m in out.result.replica_means],
                "stderrs": [float(e) for e in out.result.replica_stderrs],
                "z": float(out.result.replica_agreement_z),
                "flags": list(out.result.flags),
            }
        )
        return out

    point_mod._analyse = wrapped
    return seen


def run(
    seeds: list[int],
    equilibration: int,
    production: int,
    every: int,
    save: Callable[[list[dict]], None] | None = None,
) -> list[dict]:
    """Per-point records of the quickstart ladders for these seeds; ``save`` is called with
    the records so far after every task (a long run keeps what it has measured)."""
    seen = _capture()
    base = tomllib.loads(QUICKSTART.read_text())
    rows: list[dict] = []
    with tempfile.TemporaryDirectory(prefix="bench_replicas_") as tmp:
        for seed in seeds:
            data = json.loads(json.dumps(base))
            data["seed"] = seed
            data["kernel"]["output"] = tmp
            data["sampling"].update(
                equilibration_moves=equilibration, production_moves=production, sample_every=every
            )
            plan = make_plan(parse_config(data, "", QUICKSTART))
            for task in plan.tasks:
                t = time.process_time()
                first = len(seen)
                path = run_task(plan, task)
                with np.load(path) as f:
                    z_file = np.asarray(f["adsorption/replica_agreement_z"], dtype=float)
                pts = seen[first:]
                # the task file and the captured records must tell the same z
                assert np.allclose(z_file, [p["z"] for p in pts], equal_nan=True)
                for p in pts:
                    p["seed"] = seed
                rows.extend(pts)
                width = plan.config.widths_H_nm[task.w_index]
                print(
                    f"seed {seed} H = {width:.2f} nm: {len(pts)} points, "
                    f"{time.process_time() - t:.1f} CPU s, z = "
                    + " ".join(f"{p['z']:+.1f}" for p in pts),
                    file=sys.stderr,
                    flush=True,
                )
                task_path(plan, task).unlink()
                if save:
                    save(rows)
    return rows


def summary(z: np.ndarray) -> dict[str, float]:
    z = z[np.isfinite(z)]
    ks = stats.kstest(z, "norm")
    return {
        "points": int(len(z)),
        "mean": float(np.mean(z)),
        "sd": float(np.std(z, ddof=1)),
        "beyond_3": float(np.mean(np.abs(z) > 3.0)),
        "n_beyond_3": int(np.sum(np.abs(z) > 3.0)),
        "ks_p": float(ks.pvalue),
    }


def _seed_chi2(rows: list[dict], replica: int) -> float:
    """chi^2 per degree of freedom of one replica's means across seeds at each (H, p), with its
    reported errors: about 1 when the errors state the seed-to-seed scatter."""
    groups: dict[tuple[float, float], list[dict]] = {}
    for r in rows:
        groups.setdefault((r["width_nm"], r["pressure_Pa"]), []).append(r)
    chi2 = 0.0
    dof = 0
    for rr in groups.values():
        m = np.array([r["means"][replica] for r in rr])
        e = np.array([r["stderrs"][replica] for r in rr])
        if len(m) < 2 or np.any(~(e > 0)):
            continue
        w = 1.0 / e**2
        mu = float(np.sum(w * m) / np.sum(w))
        chi2 += float(np.sum(w * (m - mu) ** 2))
        dof += len(m) - 1
    return chi2 / dof if dof else math.nan


def _lag1(rows: list[dict]) -> float:
    """Correlation of z between neighbouring pressures of one ladder (the warm start chains
    them: a carried-over disturbance would correlate them)."""
    ladders: dict[tuple[int, float], list[tuple[float, float]]] = {}
    for r in rows:
        ladders.setdefault((r["seed"], r["width_nm"]), []).append((r["pressure_Pa"], r["z"]))
    a: list[float] = []
    b: list[float] = []
    for v in ladders.values():
        z = [x[1] for x in sorted(v)]
        a += z[:-1]
        b += z[1:]
    return float(np.corrcoef(a, b)[0, 1]) if len(a) > 2 else math.nan


def _flagged(rows: list[dict], name: str) -> int:
    """Points carrying a flag of this name (for either replica)."""
    return sum(1 for r in rows if any(f.startswith(name) for f in r["flags"]))


def _diagnostics(named: dict[str, list[dict]]) -> str:
    lines = [
        "| run | seed-to-seed chi2/dof, replica from below | same, over-filled replica | "
        "lag-1 correlation of z along a ladder | points with both replicas biased | "
        "points flagged error_unreliable | drift | replicas_disagree |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for name, rows in named.items():
        both = sum(1 for r in rows if min(r["k_trials"]) > 1)
        lines.append(
            f"| {name} | {_seed_chi2(rows, 0):.2f} | {_seed_chi2(rows, 1):.2f} | "
            f"{_lag1(rows):+.3f} | {both} | {_flagged(rows, 'error_unreliable')} | "
            f"{_flagged(rows, 'drift')} | {_flagged(rows, 'replicas_disagree')} |"
        )
    return "\n".join(lines)


def _table(named: dict[str, list[dict]]) -> str:
    lines = [
        "| run | subset | points | mean z | sd z | beyond 3 | KS p vs N(0,1) |",
        "|---|---|---|---|---|---|---|",
    ]
    for name, rows in named.items():
        subsets = {
            "all": rows,
            "same insertion method": [r for r in rows if len(set(r["k_trials"])) == 1],
            "different methods": [r for r in rows if len(set(r["k_trials"])) > 1],
            "equilibration cut in neither replica": [r for r in rows if max(r["cut_samples"]) == 0],
            "cut in the replica from below (warm start)": [
                r for r in rows if r["cut_samples"][0] > 0
            ],
            "cut in the over-filled replica": [r for r in rows if r["cut_samples"][1] > 0],
        }
        for sub, rr in subsets.items():
            if not rr:
                lines.append(f"| {name} | {sub} | 0 | | | | |")
                continue
            s = summary(np.array([r["z"] for r in rr]))
            lines.append(
                f"| {name} | {sub} | {s['points']} | {s['mean']:+.3f} | {s['sd']:.3f} | "
                f"{100 * s['beyond_3']:.1f} % ({s['n_beyond_3']}) | {s['ks_p']:.2g} |"
            )
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=5, help="number of seeds (default 5)")
    ap.add_argument("--first-seed", type=int, default=1, help="seeds first..first+N-1")
    ap.add_argument("--equilibration", type=int, default=20_000)
    ap.add_argument("--production", type=int, default=200_000)
    ap.add_argument("--every", type=int, default=50)
    ap.add_argument("--json", type=Path, help="write the per-point records here")
    ap.add_argument("--label", default="this code")
    ap.add_argument(
        "--compare", nargs="+", type=Path, help="tabulate saved runs (files of one label pooled)"
    )
    args = ap.parse_args()
    if args.compare:
        named = {}
        for p in args.compare:
            rec = json.loads(p.read_text())
            named.setdefault(rec["label"], []).extend(rec["points"])
        print(_table(named))
        print()
        print(_diagnostics(named))
        return
    t0 = time.perf_counter()
    seeds = list(range(args.first_seed, args.first_seed + args.seeds))

    def save(rows: list[dict]) -> None:
        if not args.json:
            return
        tmp = args.json.with_name(f".{args.json.name}.tmp")
        record = {
            "label": args.label,
            "seeds": seeds,
            "equilibration_moves": args.equilibration,
            "production_moves": args.production,
            "sample_every": args.every,
            "wall_s": time.perf_counter() - t0,
            "cpu_s": time.process_time(),
            "points": rows,
        }
        tmp.write_text(json.dumps(record, indent=1))
        tmp.replace(args.json)

    rows = run(seeds, args.equilibration, args.production, args.every, save)
    wall = time.perf_counter() - t0
    save(rows)
    print(_table({args.label: rows}))
    print()
    print(_diagnostics({args.label: rows}))
    print(f"wall {wall:.0f} s, CPU {time.process_time():.0f} s")
    if not math.isfinite(wall):
        sys.exit(1)


if __name__ == "__main__":
    main()
