"""Exchanges per CPU second: the fractional-molecule move (CFCMC, gcmc.sampling.fractional)
against whole-molecule insertion/deletion (gcmc.sampling.engine.run_moves) at dense states.

Regimes:

- ``lj-1.5-0.8``: bulk LJ, T* = 1.5, at the activity of rho* = 0.8 (Thol et al. 2016 via
  teqp), 256-molecule box, r_c = 3 sigma with the homogeneous tail;
- ``lj-1.0-0.85``: bulk LJ, T* = 1.0, activity of rho* = 0.85 (compressed liquid);
- ``ar-3s-0.1``: argon 87.3 K in a 3 sigma slit (H = 1.0215 nm), p/p0 = 0.1, reference
  equation of state (CoolProp), hexagonal lateral box, slab tail (the filled pore of
  benchmarks/README.md, "Dense confined phases").

Both samplers start from the same configuration (bulk: a melted lattice at the EOS density;
slit: the end of a whole-molecule run from an empty pore) and run a fixed number of moves.
"exchanges" = accepted insertions + deletions (CFCMC: accepted lambda crossings of 1 and 0);
for CFCMC also "growth transits" (gcmc.sampling.fractional.growth_transits: N + lambda moved
from one integer to the next, i.e. a molecule grown from nothing to whole or shrunk away,
sampled every 10 moves), which does not count a fractional molecule flickering across an end;
for the whole-molecule sampler the same count on N (sampled every 10 moves: an insertion
undone within 10 moves is not counted).
The whole-molecule sampler uses plain insertion (k = 1) in bulk and biased insertion k = 64
in the slit (the point sampler's choice there). CFCMC's Wang-Landau flattening of W(lambda)
is timed separately and not counted in its rate. CPU seconds are process time.
Run: ``NUMBA_NUM_THREADS=1 python benchmarks/bench_fractional.py [--regimes a,b] [--moves M]``.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import time

os.environ.setdefault("NUMBA_NUM_THREADS", "1")

import numpy as np  # noqa: E402

from gcmc.physics.eos import make_eos  # noqa: E402
from gcmc.physics.model import BULK, PoreModel, Probe, Solid, get_probe  # noqa: E402
from gcmc.physics.potentials import slit_pore, with_lateral_box  # noqa: E402
from gcmc.physics.units import activity_per_nm3  # noqa: E402
from gcmc.sampling.box import Box, EngineOptions  # noqa: E402
from gcmc.sampling.engine import F_P_DISPLACE  # noqa: E402
from gcmc.sampling.fractional import (  # noqa: E402
    FractionalOptions,
    FractionalSampler,
    growth_transits,
    uncoupled_mean,
    window_log_distribution,
)
from gcmc.sampling.rng import seed_state  # noqa: E402

EPS_K, SIG_NM = 120.0, 0.34


def _bulk(t_star: float, rho_star: float, n: int = 256):
    import teqp

    m = teqp.make_model({"kind": "LJ126_TholJPCRD2016", "model": {}})
    a0, a1 = m.get_Ar01n(t_star, rho_star, np.array([1.0]))
    z = rho_star * math.exp(a0 + a1) / SIG_NM**3
    length = (n / rho_star) ** (1 / 3) * SIG_NM
    probe = Probe(name="lj", epsilon_k=EPS_K, sigma_nm=SIG_NM)
    model = PoreModel(probe, Solid(), BULK, cutoff_nm=3 * SIG_NM, box_nm=length)
    k = int(math.ceil(n ** (1 / 3)))
    g = (np.arange(k) + 0.5) / k * length
    sites = np.array([(a, b, c) for a in g for b in g for c in g])
    pos = sites[np.random.default_rng(1).choice(len(sites), n, replace=False)]
    box = Box(model, t_star * EPS_K, z, rng_state=seed_state(1))
    box.load_positions(pos)
    box.fp[F_P_DISPLACE] = 1.0  # displacements only: melt the lattice at fixed N
    box.run(400 * n)
    return model, t_star * EPS_K, z, box.positions(), 1, rho_star * box.model.volume_nm3 / SIG_NM**3


def _slit():
    probe = get_probe("argon")
    eos = make_eos("reference", probe)
    t = 87.3
    p = 0.1 * eos.saturation_pressure(t)
    z = activity_per_nm3(eos.state(t, p).fugacity_Pa, t)
    model = with_lateral_box(slit_pore(probe, 3.0 * probe.sigma_nm, 1.0), "hexagonal")
    box = Box(model, t, z, EngineOptions(insertion_trials=64), rng_state=seed_state(3))
    box.run(3_000_000)
    return model, t, z, box.positions(), 64, float("nan")


REGIMES = {
    "lj-1.5-0.8": lambda: _bulk(1.5, 0.8),
    "lj-1.0-0.85": lambda: _bulk(1.0, 0.85),
    "ar-3s-0.1": _slit,
}


def run(
    name: str, moves: int, opts: FractionalOptions, n_min: int = 0, wl_checks: int = 200
) -> dict:
    model, t, z, pos, k, n_eos = REGIMES[name]()
    out: dict = {"regime": name, "moves": moves, "n_start": len(pos), "n_eos": n_eos}
    # whole-molecule insertion / deletion
    box = Box(model, t, z, EngineOptions(insertion_trials=k), rng_state=seed_state(11))
    box.load_positions(pos)
    box.run(10_000)
    box.reset_counters()
    ns = moves // 10
    on, ou, os_ = np.zeros(ns, dtype=np.int64), np.zeros(ns), np.zeros(ns)
    c0 = time.process_time()
    box.run(moves, 10, on, ou, os_, 0, np.zeros(box.n_bins))
    dt = time.process_time() - c0
    out["whole"] = {
        "k": k,
        "cpu_s": dt,
        "exchanges": box.exchanges,
        "per_cpu_s": box.exchanges / dt,
        "net_unit_changes": growth_transits(on, np.zeros(ns)),
        "net_unit_changes_per_cpu_s": growth_transits(on, np.zeros(ns)) / dt,
        "acceptance": box.acceptance(),
        "mean_n": float(on.mean()),
    }
    # fractional molecule
    s = FractionalSampler(model, t, z, True, opts, rng_state=seed_state(12))
    s.set_window(n_min)
    s.load_positions(pos, 0.0)
    s.run(10_000)
    c0 = time.process_time()
    lnf = s.flatten_weights(200_000, ln_f_start=0.5, ln_f_end=2e-3, max_checks=wl_checks)
    wl = time.process_time() - c0
    s.counters[:] = 0
    ns = moves // 10
    n, lam, u = np.zeros(ns, dtype=np.int64), np.zeros(ns), np.zeros(ns)
    c0 = time.process_time()
    s.run(moves, 10, n, lam, u)
    dt = time.process_time() - c0
    # with an (N, lambda) bias the plain mean is biased: window_ln_p below instead
    mean_n, err_n = uncoupled_mean(n, lam, opts.n_lambda_bins) if not opts.n_window else (0, 0)
    out["fractional"] = {
        "cpu_s": dt,
        "wang_landau_cpu_s": wl,
        "wang_landau_final_ln_f": lnf,
        "n_range": [int(n.min()), int(n.max())],
        "exchanges": s.exchanges,
        "per_cpu_s": s.exchanges / dt,
        "growth_transits": growth_transits(n, lam),
        "growth_transits_per_cpu_s": growth_transits(n, lam) / dt,
        "acceptance": s.acceptance(),
        "mean_n_uncoupled": mean_n,
        "stderr_n_uncoupled": err_n,
    }
    if opts.n_window > 0:
        lp = window_log_distribution(n, lam, s.weights, n_min, opts.n_window)
        out["fractional"]["window_ln_p"] = (lp - np.max(lp[np.isfinite(lp)])).tolist()
        out["fractional"]["window_n_min"] = n_min
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--regimes", default=",".join(REGIMES))
    ap.add_argument("--moves", type=int, default=10_000_000)
    ap.add_argument("--json", default="")
    ap.add_argument("--fractional-displacement", type=float, default=0.1)
    ap.add_argument("--whole-displacement", type=float, default=0.5)
    ap.add_argument("--max-dlambda", type=float, default=0.2)
    ap.add_argument("--lambda-bins", type=int, default=50)
    ap.add_argument(
        "--window", default="", help="N_MIN:N_WINDOW: bias on (N, lambda) over that N window"
    )
    ap.add_argument("--wl-checks", type=int, default=200, help="Wang-Landau checks at most")
    a = ap.parse_args()
    res = []
    for name in a.regimes.split(","):
        opts = FractionalOptions(
            whole_displacement=a.whole_displacement,
            fractional_displacement=a.fractional_displacement,
            max_dlambda=a.max_dlambda,
            n_lambda_bins=a.lambda_bins,
            n_window=int(a.window.split(":")[1]) if a.window else 0,
        )
        n_min = int(a.window.split(":")[0]) if a.window else 0
        r = run(name, a.moves, opts, n_min, a.wl_checks)
        r["options"] = {k: getattr(opts, k) for k in ("whole_displacement", "max_dlambda")}
        r["options"]["fractional_displacement"] = opts.fractional_displacement
        r["options"]["window"] = a.window
        res.append(r)
        print(json.dumps(r, indent=1, default=float), flush=True)
    if a.json:
        from pathlib import Path

        from gcmc.files import atomic_write_text

        atomic_write_text(Path(a.json), json.dumps(res, indent=1, default=float))


if __name__ == "__main__":
    main()
