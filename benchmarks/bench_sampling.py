"""Sampling efficiency per regime and method: what it costs to get a converged point.

Regimes (lateral box 10 sigma, r_c = 3 sigma, Steele graphite walls):

- ``ar-3s-filled``: argon at 87.3 K (T* = 0.73) in a 3 sigma slit (H = 1.02 nm), p/p0 = 0.1
- ``ar-10s-filled``: argon at 87.3 K in a 10 sigma slit (H = 3.41 nm), p/p0 = 0.9 (condensed)
- ``ar-10s-film``: argon at 87.3 K in a 10 sigma slit, p/p0 = 0.01 (about one layer per wall)
- ``ch4-3s-supercritical``: methane at 298.15 K, 3 MPa, 3 sigma slit (H = 1.12 nm)

Methods: plain insertion (k = 1); Rosenbluth-biased insertion with k = 64 and k = 256; replica
exchange along a short ladder (p x {0.8, 1, 1.25}, plain insertion, gcmc.sampling.ladder).

A point is converged when its two replicas, one started from the previous lower-pressure state
(p/2, prepared by a short plain run that is not charged to the method) and one from an
over-filled state (20 z for half the equilibration), pass the drift test and agree within 1 %.
Production doubles from a small length until the point converges or the CPU budget of the
(regime, method) cell is spent; the reported cost is the CPU time of the converged run (both
replicas, equilibration included; for the ladder: ladder CPU / rungs, i.e. per point).

Run: ``python benchmarks/bench_sampling.py [--budget S] [--json out.json]`` on one core
(NUMBA_NUM_THREADS=1). Total wall time stays under about 8 min at the default budget.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from dataclasses import replace

os.environ.setdefault("NUMBA_NUM_THREADS", "1")

import numpy as np

from gcmc.physics.eos import make_eos
from gcmc.physics.model import SLIT, PoreModel, default_solid, get_probe
from gcmc.sampling.box import Box, EngineOptions, warm_up
from gcmc.sampling.ladder import simulate_ladder
from gcmc.sampling.point import SamplingSettings, ThermoState, simulate_point

REGIMES = {
    "ar-3s-filled": ("argon", 87.3, 3.0, ("relative", 0.1)),
    "ar-10s-filled": ("argon", 87.3, 10.0, ("relative", 0.9)),
    "ar-10s-film": ("argon", 87.3, 10.0, ("relative", 0.01)),
    "ch4-3s-supercritical": ("methane", 298.15, 3.0, ("absolute", 3.0e6)),
}
METHODS = ("plain", "biased-64", "biased-256", "exchange")
LADDER = (0.8, 1.0, 1.25)


def _state(eos, t: float, p: float) -> ThermoState:
    s = eos.state(t, p)
    return ThermoState(
        temperature_K=t,
        fugacity_Pa=s.fugacity_Pa,
        pressure_Pa=p,
        bulk_density_per_nm3=s.density_per_nm3,
        eos="reference",
    )


def _setup(name: str):
    probe_name, t, h_sigma, (kind, value) = REGIMES[name]
    probe = get_probe(probe_name)
    sig = probe.sigma_nm
    model = PoreModel(
        probe=probe,
        solid=default_solid(),
        geometry=SLIT,
        cutoff_nm=3.0 * sig,
        box_nm=10.0 * sig,
        width_nm=h_sigma * sig,
    )
    eos = make_eos("reference", probe)
    p = value * eos.saturation_pressure(t) if kind == "relative" else value
    return model, eos, t, p


def _start_config(model: PoreModel, state: ThermoState, moves: int, seed: int) -> np.ndarray:
    """The previous lower-pressure state (p/2): a short plain run, not charged."""
    box = Box(
        model,
        state.temperature_K,
        state.activity_nm3,
        EngineOptions(insertion_trials=1),
        rng_state=np.array([seed, 7, 11, 13], dtype=np.uint64),
    )
    box.run(moves)
    return box.positions()


def _converged(r) -> tuple[bool, float]:
    m = r.replica_means
    rel = abs(m[0] - m[1]) / max(abs(0.5 * (m[0] + m[1])), 1e-12)
    drift_ok = not any(f.startswith(("drift", "not_bracketed")) for f in r.flags)
    return bool(drift_ok and rel <= 0.01 and r.molecules_mean > 0), float(rel)


def run_cell(name: str, method: str, budget: float, start_moves: int) -> dict:
    model, eos, t, p = _setup(name)
    state = _state(eos, t, p)
    start = _start_config(model, _state(eos, t, 0.5 * p), start_moves, seed=1)
    k = {"plain": 1, "biased-64": 64, "biased-256": 256, "exchange": 1}[method]
    n_start = len(start)
    prod = 20_000 if method != "exchange" else 10_000
    spent = 0.0
    rec: dict = {
        "regime": name,
        "method": method,
        "H_nm": model.width_nm,
        "T_K": t,
        "p_Pa": p,
        "budget_s": budget,
        "start_N": n_start,
    }
    attempt = 0
    while True:
        attempt += 1
        s = SamplingSettings(
            equilibration_moves=prod // 2,
            production_moves=prod,
            sample_every=50,
            insertion_trials=k,
            replicas=2,
        )
        c0 = time.process_time()
        if method == "exchange":
            states = [_state(eos, t, f * p) for f in LADDER]
            out = simulate_ladder(
                model, states, s, seed=1000 + attempt, starts=[start] * len(states)
            )
            r = out.points[1].result
            cost = (time.process_time() - c0) / len(states)
            rec["swap_acceptance"] = [float(a) for a in out.swap_acceptance]
        else:
            r = simulate_point(model, state, s, seed=1000 + attempt, start=start).result
            cost = time.process_time() - c0
        spent += cost * (len(LADDER) if method == "exchange" else 1)
        ok, rel = _converged(r)
        acc = r.acceptance
        exch = (
            r.moves
            * (1 - s.displacement_fraction)
            * 0.5
            * (acc.get("insertion", 0.0) + acc.get("deletion", 0.0))
        )
        rec.update(
            {
                "production_moves": prod,
                "attempts": attempt,
                "insertion_acceptance": acc.get("insertion", float("nan")),
                "exchanges_per_cpu_s": exch / max(r.seconds, 1e-9),
                "N": r.molecules_mean,
                "replica_means": r.replica_means,
                "replica_rel_diff": rel,
                "drift_z": r.drift_z,
                "point_cpu_s": cost,
                "spent_cpu_s": spent,
                "converged": ok,
                "flags": r.flags,
            }
        )
        if ok or spent * 3.0 > budget:  # the next (doubled) run would exceed the budget
            return rec
        prod *= 2


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument(
        "--budget",
        type=float,
        default=24.0,
        help="CPU seconds per (regime, method) cell (default 24)",
    )
    ap.add_argument("--start-moves", type=int, default=100_000)
    ap.add_argument("--regimes", default=",".join(REGIMES))
    ap.add_argument("--methods", default=",".join(METHODS))
    ap.add_argument("--json", default="")
    a = ap.parse_args()
    warm_up()
    t0 = time.perf_counter()
    rows = []
    for name in a.regimes.split(","):
        for method in a.methods.split(","):
            rec = run_cell(name, method, a.budget, a.start_moves)
            rows.append(rec)
            verdict = (
                f"{rec['point_cpu_s']:.1f} s"
                if rec["converged"]
                else f"not converged within budget {a.budget:g} s"
            )
            ins = rec["insertion_acceptance"]
            print(
                f"{name:22s} {method:11s} N={rec['N']:8.1f} ins.acc={ins:.2e}"
                f" exch/s={rec['exchanges_per_cpu_s']:9.0f} rel={rec['replica_rel_diff']:.3f}"
                f" prod={rec['production_moves']:>8d}  {verdict}",
                flush=True,
            )
    print(f"total wall {time.perf_counter() - t0:.0f} s")
    if a.json:
        with open(a.json, "w") as fh:
            json.dump(rows, fh, indent=1, default=float)


if __name__ == "__main__":
    _ = replace  # (kept for callers that vary SamplingSettings)
    main()
