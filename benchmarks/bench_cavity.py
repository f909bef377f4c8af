"""Cavity-biased exchange (gcmc.sampling.cavity) on the filled argon 3 sigma slit: exchanges per
CPU second against the engine's k = 64 biased insertion, the N trajectory from a frozen
start, and a certificate attempt (gcmc.sampling.certificate.judge_preparations).

State (benchmarks/README.md, "Dense confined phases"): argon 87.3 K, H = 3 sigma (1.0215 nm),
p/p0 = 0.1 through the reference equation of state (CoolProp), hexagonal lateral box (9 x 12
rows, 3.406 x 3.933 nm), r_c = 3 sigma with the slab tail, Steele graphite walls. Optionally
(``--regime n2``) nitrogen 77.35 K, H = 1.0 nm, p/p0 = 0.1.

Part 1 (``rates``): one start configuration (3x10^6 moves of k = 64 biased insertion from an
empty pore, seed 3, as benchmarks/bench_fractional.py), the displacement step adapted once by
the cavity sampler (40 % acceptance) and used by both samplers; then ``--moves`` moves each,
N sampled every 1000 moves. Part 2 (``certificate``): 4 preparations with the cavity sampler
(from empty and over-filled at 20 z for half the equilibration, two seeds each) and the
larger hexagonal box (sqrt(2) x the edge, 13 x 16 rows) from empty; renewals = accepted
exchanges per molecule in production. CPU seconds are process time (shared machine).
Run: ``NUMBA_NUM_THREADS=1 python benchmarks/bench_cavity.py --json out.json``.
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
from gcmc.physics.model import get_probe  # noqa: E402
from gcmc.physics.potentials import slit_pore, with_lateral_box  # noqa: E402
from gcmc.sampling.box import Box, EngineOptions  # noqa: E402
from gcmc.sampling.cavity import CavityOptions, CavitySampler, sample_cavity  # noqa: E402
from gcmc.sampling.certificate import CertifySettings, Preparation, judge_preparations  # noqa: E402
from gcmc.sampling.point import SamplingSettings, ThermoState, _analyse, _ReplicaRun  # noqa: E402
from gcmc.sampling.rng import seed_state  # noqa: E402
from gcmc.sampling.statistics import drift_test  # noqa: E402

REGIMES = {
    "ar": ("argon", 87.3, ("sigma", 3.0)),
    "n2": ("nitrogen", 77.35, ("nm", 1.0)),
}


def setup(name: str):
    probe_name, t, (hk, hv) = REGIMES[name]
    probe = get_probe(probe_name)
    eos = make_eos("reference", probe)
    h = hv * probe.sigma_nm if hk == "sigma" else hv
    p = 0.1 * eos.saturation_pressure(t)
    b = eos.state(t, p)
    state = ThermoState(
        temperature_K=t,
        fugacity_Pa=b.fugacity_Pa,
        pressure_Pa=p,
        bulk_density_per_nm3=b.density_per_nm3,
        residual_enthalpy_K=b.residual_enthalpy_K,
        eos="reference",
    )
    model = slit_pore(probe, width_nm=h, box_nm=1.0)
    return model, state


def rates(name: str, moves: int, opts: CavityOptions) -> dict:
    model, state = setup(name)
    small = with_lateral_box(model, "hexagonal")
    t, z = state.temperature_K, state.activity_nm3
    c0 = time.process_time()
    prep = Box(small, t, z, EngineOptions(insertion_trials=64), rng_state=seed_state(3))
    prep.run(3_000_000)
    start = prep.positions()
    prep_cpu = time.process_time() - c0
    # the step: adapted by the cavity sampler's equilibration at fixed start
    s = CavitySampler(small, t, z, opts, rng_state=seed_state(12))
    s.load_positions(start)
    s.equilibrate(400_000)
    step = s.box.max_displacement_nm
    out: dict = {"regime": name, "moves": moves, "n_start": len(start), "step_nm": step,
                 "start_cpu_s": prep_cpu, "options": opts.__dict__}  # fmt: skip
    every = 1000
    ns = moves // every
    # engine, k = 64
    box = Box(small, t, z, EngineOptions(insertion_trials=64), rng_state=seed_state(11),
              max_displacement_nm=step)  # fmt: skip
    box.load_positions(start)
    n, u1, u2 = np.zeros(ns, dtype=np.int64), np.zeros(ns), np.zeros(ns)
    c0 = time.process_time()
    box.run(ns * every, every, n, u1, u2, 0, np.zeros(box.n_bins))
    dt = time.process_time() - c0
    out["engine_k64"] = {"cpu_s": dt, "exchanges": box.exchanges,
                         "per_cpu_s": box.exchanges / dt, "acceptance": box.acceptance(),
                         "n_mean": float(n.mean()), "n_sd": float(n.std()),
                         "n_traj": n[:: max(1, ns // 50)].tolist()}  # fmt: skip
    # cavity-biased
    s = CavitySampler(small, t, z, opts, rng_state=seed_state(11), max_displacement_nm=step)
    s.load_positions(start)
    n = np.zeros(ns, dtype=np.int64)
    c0 = time.process_time()
    s.run(ns * every, every, n, u1, u2, 0, np.zeros(s.box.n_bins))
    dt = time.process_time() - c0
    hit = np.nonzero(n >= 216)[0]
    out["cavity"] = {"cpu_s": dt, "exchanges": s.exchanges, "per_cpu_s": s.exchanges / dt,
                     "acceptance": s.acceptance(), "no_cavity_insertions": int(s.xcounters[0]),
                     "deletions_not_cavity": int(s.xcounters[1]),
                     "n_mean": float(n.mean()), "n_sd": float(n.std()),
                     "first_216_moves": int((hit[0] + 1) * every) if len(hit) else -1,
                     "n_traj": n[:: max(1, ns // 50)].tolist()}  # fmt: skip
    return out


def _prep(tag: str, model, state, seed: int, eq: int, prod: int, over: float,
          opts: CavityOptions, every: int) -> Preparation:  # fmt: skip
    c0 = time.process_time()
    r = sample_cavity(model, state.temperature_K, state.activity_nm3, prod, every, seed, eq,
                      options=opts, overfill_factor=over)  # fmt: skip
    cpu = time.process_time() - c0
    n = r.n.astype(float)
    d = drift_test(n) if len(n) >= 40 else None
    run = _ReplicaRun(n=r.n, uff=r.uff, usf=r.usf, profile=r.profile, box=r.sampler.box,
                      moves=eq + prod, seconds=cpu, t0=0, k_trials=0,
                      acceptance=r.acceptance, exchanges=r.exchanges)  # fmt: skip
    ss = SamplingSettings(equilibration_moves=eq, production_moves=prod, sample_every=every,
                          replicas=1)  # fmt: skip
    res = _analyse(model, state, ss, [run]).result
    res.method = "cavity"
    mean = float(n.mean())
    lx, ly, _ = model.box_lengths_nm
    return Preparation(
        name=tag,
        box_nm=(lx, ly),
        molecules_mean=mean,
        molecules_stderr=res.molecules_stderr,
        molecules_sd=float(n.std()),
        density_per_nm3=mean / model.pore_volume_nm3,
        drift_z=float(d.z_score) if d else math.nan,
        drift_passed=bool(d.passed) if d else False,
        renewals_hot=0,
        exchanges=int(r.exchanges),
        renewals=r.exchanges / mean if mean > 0 else math.inf,
        swap_acceptance=[],
        cpu_s=cpu,
        result=res,
    )


def certificate(name: str, eq: int, prod: int, opts: CavityOptions, every: int) -> dict:
    model, state = setup(name)
    small = with_lateral_box(model, "hexagonal")
    big = with_lateral_box(model, "hexagonal", math.sqrt(2.0))
    t0 = time.process_time()
    preps = []
    for tag, seed, over in (("below", 1, 0.0), ("overfilled", 2, 20.0), ("below-2", 3, 0.0),
                            ("overfilled-2", 4, 20.0)):  # fmt: skip
        preps.append(_prep(tag, small, state, seed, eq, prod, over, opts, every))
        p = preps[-1]
        print(f"  {tag}: N {p.molecules_mean:.2f} sd {p.molecules_sd:.2f} drift z "
              f"{p.drift_z:.1f} exch {p.exchanges} cpu {p.cpu_s:.0f}", flush=True)  # fmt: skip
    area = (big.box_lengths_nm[0] * big.box_lengths_nm[1]) / (
        small.box_lengths_nm[0] * small.box_lengths_nm[1]
    )
    boxp = _prep("below, larger box", big, state, 5, int(eq * area), int(prod * area), 0.0,
                 opts, every)  # fmt: skip
    print(f"  big: N {boxp.molecules_mean:.2f} sd {boxp.molecules_sd:.2f} drift z "
          f"{boxp.drift_z:.1f} exch {boxp.exchanges} cpu {boxp.cpu_s:.0f}", flush=True)  # fmt: skip
    cpu = time.process_time() - t0
    cert = judge_preparations(CertifySettings(), preps, boxp, prod, cpu, method="cavity")
    return {
        "regime": name,
        "equilibration_moves": eq,
        "production_moves": prod,
        "certified": cert.certified,
        "density_per_nm3": cert.density_per_nm3,
        "spread_rel": cert.density_spread_rel,
        "box_difference_rel": cert.box_difference_rel,
        "min_renewals": cert.min_renewals,
        "preparations": [p.to_dict() for p in preps],
        "box_check": boxp.to_dict(),
        "flags": cert.flags,
        "cpu_s": cpu,
    }


def tempering(name: str, production: int, budget: float) -> dict:
    """The tempering certificate (gcmc.sampling.certificate.certify_filled_point: 4
    preparations + the larger box, hot rungs to 1.4 T) with cavity-biased exchange in every
    rung (box_class=CavityBox) instead of the engine's k = 64 insertion."""
    from gcmc.physics.eos import make_eos as _eos
    from gcmc.sampling.cavity import CavityBox
    from gcmc.sampling.certificate import certify_filled_point

    model, state = setup(name)
    eos = _eos("reference", model.probe)
    cs = CertifySettings(
        equilibration_moves=production // 4, production_moves=production, budget_cpu_s=budget
    )
    t0 = time.process_time()
    cert = certify_filled_point(
        model, state, 1, cs, eos, box_class=CavityBox, method="certified-cavity"
    )
    out = {
        "regime": name,
        "certified": cert.certified,
        "density_per_nm3": cert.density_per_nm3,
        "spread_rel": cert.density_spread_rel,
        "box_difference_rel": cert.box_difference_rel,
        "min_renewals": cert.min_renewals,
        "production_moves": cert.production_moves,
        "preparations": [p.to_dict() for p in cert.preparations],
        "box_check": cert.box_check.to_dict() if cert.box_check else None,
        "flags": cert.flags,
        "cpu_s": time.process_time() - t0,
    }
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--regime", default="ar", choices=sorted(REGIMES))
    ap.add_argument("--parts", default="rates,certificate")
    ap.add_argument("--moves", type=int, default=5_000_000, help="rates: moves per sampler")
    ap.add_argument("--equilibration", type=int, default=5_000_000)
    ap.add_argument("--production", type=int, default=15_000_000)
    ap.add_argument("--every", type=int, default=1000)
    ap.add_argument("--grid", type=float, default=0.2, help="grid cell edge / sigma")
    ap.add_argument("--radius", type=float, default=0.8, help="R_c / sigma")
    ap.add_argument("--tempering-production", type=int, default=1_000_000, help="per rung")
    ap.add_argument("--budget", type=float, default=600.0, help="tempering: CPU s")
    ap.add_argument("--json", default="")
    a = ap.parse_args()
    opts = CavityOptions(grid_sigma=a.grid, cavity_radius_sigma=a.radius)
    res = []
    for part in a.parts.split(","):
        if part == "rates":
            r = rates(a.regime, a.moves, opts)
        elif part == "tempering":
            r = tempering(a.regime, a.tempering_production, a.budget)
        else:
            r = certificate(a.regime, a.equilibration, a.production, opts, a.every)
        r["part"] = part
        res.append(r)
        print(json.dumps(r, default=float)[:3000], flush=True)
        if a.json:
            from pathlib import Path

            from gcmc.files import atomic_write_text

            atomic_write_text(Path(a.json), json.dumps(res, indent=1, default=float))


if __name__ == "__main__":
    main()
