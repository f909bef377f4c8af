"""Dense confined phases: can a filled subcritical point be certified, at what cost?

Regimes (r_c = 3 sigma, Steele graphite walls, reference equations of state via CoolProp):

- ``ar-3s-0.1``: argon 87.3 K in a 3 sigma slit (H = 1.0215 nm), p/p0 = 0.1 (filled)
- ``n2-1.0nm-0.1``: nitrogen 77.35 K, H = 1.0 nm, p/p0 = 0.1 (filled)
- ``ar-10s-0.9``: argon 87.3 K in a 10 sigma slit (H = 3.405 nm), p/p0 = 0.9 (condensed;
  only with ``--wide``: several times the cost of the others)
- ``ar-10s-film``: argon 87.3 K in the 10 sigma slit, p/p0 = 0.01 (about a monolayer per wall)
- ``ch4-3s-super``: methane 298.15 K, 3 MPa, 3 sigma slit (supercritical)

Methods:

- ``point``: the point-wise sampler (gcmc.sampling.point, automatic biased insertion, two
  replicas per run: from an empty pore and over-filled at 20 z); 4 preparations = the two
  replicas of two seeds, in the hexagonal box; the box-size check = one more run in the
  hexagonal box of sqrt(2) x the edge. Judged by the same certificate rules
  (gcmc.sampling.certificate.judge_preparations), renewals = accepted exchanges per molecule.
- ``certified-tempering``: gcmc.sampling.certificate.certify_filled_point (4 hyper-parallel
  tempering preparations + the larger box), only for the dense subcritical regimes.

CPU seconds are process time of this (single-threaded) process: the machine is shared, wall
time would measure the neighbours. Run:
``NUMBA_NUM_THREADS=1 taskset -c 0 python benchmarks/bench_dense.py --json out.json``.
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
from gcmc.sampling.box import warm_up  # noqa: E402
from gcmc.sampling.certificate import (  # noqa: E402
    CertifySettings,
    Preparation,
    certify_filled_point,
    judge_preparations,
)
from gcmc.sampling.point import SamplingSettings, ThermoState, simulate_point  # noqa: E402
from gcmc.sampling.statistics import drift_test  # noqa: E402

# name: probe, T, (H in sigma | H in nm), pressure (kind, value), dense
REGIMES = {
    "ar-3s-0.1": ("argon", 87.3, ("sigma", 3.0), ("relative", 0.1), True),
    "n2-1.0nm-0.1": ("nitrogen", 77.35, ("nm", 1.0), ("relative", 0.1), True),
    "ar-10s-0.9": ("argon", 87.3, ("sigma", 10.0), ("relative", 0.9), True),
    "ar-10s-film": ("argon", 87.3, ("sigma", 10.0), ("relative", 0.01), False),
    "ch4-3s-super": ("methane", 298.15, ("sigma", 3.0), ("absolute", 3.0e6), False),
}


def _setup(name: str):
    probe_name, t, (hk, hv), (pk, pv), dense = REGIMES[name]
    probe = get_probe(probe_name)
    eos = make_eos("reference", probe)
    h = hv * probe.sigma_nm if hk == "sigma" else hv
    p = pv * eos.saturation_pressure(t) if pk == "relative" else pv
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
    return model, state, eos, dense


def _point_preps(model, state, moves: int, seed: int, tag: str) -> list[Preparation]:
    s = SamplingSettings(
        equilibration_moves=moves // 5, production_moves=moves, sample_every=100, replicas=2
    )
    t = time.process_time()
    out = simulate_point(model, state, s, seed)
    cpu = time.process_time() - t
    r = out.result
    lx, ly, _ = model.box_lengths_nm
    preps = []
    # the analysed series of replica 0 is out.series_n; replica 1's mean comes from the
    # record (its series is not kept): its drift verdict is read from the flags
    for i, name in enumerate(("below", "overfilled")):
        mean = r.replica_means[i]
        drift_flag = any(f.startswith(f"drift[{i}]") for f in r.flags)
        n = out.series_n.astype(float) if i == 0 else None
        d = drift_test(n) if n is not None and len(n) >= 40 else None
        exch = _exchanges(r, i, mean)
        preps.append(
            Preparation(
                name=f"{name}{tag}",
                box_nm=(lx, ly),
                molecules_mean=mean,
                molecules_stderr=r.replica_stderrs[i],
                molecules_sd=float(np.std(n)) if n is not None else math.nan,
                density_per_nm3=mean / model.pore_volume_nm3,
                drift_z=float(d.z_score) if d else math.nan,
                drift_passed=not drift_flag,
                renewals_hot=0,
                exchanges=exch,
                renewals=exch / mean if mean > 0 else math.inf,
                swap_acceptance=[],
                cpu_s=cpu / 2,
                result=r,
            )
        )
    return preps


def _exchanges(r, i: int, mean: float) -> int:
    """Accepted insertions + deletions of replica i: exact from the few_exchanges flag when
    it fired, else at least max(20, N) (the flag's threshold); the acceptance record holds
    replica 0's rates: production moves x insertion share x acceptance."""
    for f in r.flags:
        if f.startswith(f"few_exchanges[{i}]"):
            return int(f.split(": ")[1].split(" ")[0])
    acc = r.acceptance
    prod = r.moves / 2.0  # both replicas, equilibration included: an upper bound
    share = 0.25  # insertion and deletion attempts each (displacement_fraction = 0.5)
    est = prod * share * (acc.get("insertion", 0.0) + acc.get("deletion", 0.0))
    return int(max(est, max(20, mean)))


def run_point(name: str, moves: int) -> dict:
    model, state, _, _ = _setup(name)
    small = with_lateral_box(model, "hexagonal")
    big = with_lateral_box(model, "hexagonal", math.sqrt(2.0))
    t = time.process_time()
    preps = _point_preps(small, state, moves, 1, "") + _point_preps(small, state, moves, 2, "-2")
    boxp = _point_preps(big, state, moves, 3, " larger box")[0]
    cpu = time.process_time() - t
    cert = judge_preparations(CertifySettings(), preps, boxp, moves, cpu, method="point")
    return _row(name, cert)


def run_certified(name: str, production: int, budget: float) -> dict:
    model, state, eos, _ = _setup(name)
    cs = CertifySettings(
        equilibration_moves=production // 4, production_moves=production, budget_cpu_s=budget
    )
    cert = certify_filled_point(model, state, 1, cs, eos)
    return _row(name, cert)


def _row(name: str, cert) -> dict:
    preps = cert.preparations
    return {
        "regime": name,
        "method": cert.method,
        "density_per_nm3": cert.density_per_nm3,
        "preparations": [p.to_dict() for p in preps],
        "box_check": cert.box_check.to_dict() if cert.box_check else None,
        "spread_rel": cert.density_spread_rel,
        "box_difference_rel": cert.box_difference_rel,
        "min_renewals": cert.min_renewals,
        "renewals_min": min(p.renewals for p in preps),
        "exchanges_per_molecule_min": min(
            p.exchanges / p.molecules_mean if p.molecules_mean > 0 else math.inf for p in preps
        ),
        "certified": cert.certified,
        "cpu_s": cert.cpu_s,
        "production_moves": cert.production_moves,
        "flags": cert.flags,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--regimes", default="ar-3s-0.1,n2-1.0nm-0.1,ar-10s-film,ch4-3s-super")
    ap.add_argument("--wide", action="store_true", help="also the 10 sigma condensed pore")
    ap.add_argument("--point-moves", type=int, default=500_000)
    ap.add_argument("--production", type=int, default=1_000_000, help="per rung, first attempt")
    ap.add_argument("--budget", type=float, default=600.0, help="CPU s per certification")
    ap.add_argument("--json", default=None)
    ap.add_argument(
        "--table", nargs="+", default=None, metavar="JSON", help="print the table of saved runs"
    )
    args = ap.parse_args()
    if args.table:
        rows = [r for f in args.table for r in json.loads(open(f).read())]
        _table(rows)
        return
    warm_up()
    names = args.regimes.split(",") + (["ar-10s-0.9"] if args.wide else [])
    rows = []
    for name in names:
        dense = REGIMES[name][4]
        rows.append(run_point(name, args.point_moves))
        print(json.dumps(rows[-1], default=float)[:400], flush=True)
        if dense:
            rows.append(run_certified(name, args.production, args.budget))
            print(json.dumps(rows[-1], default=float)[:400], flush=True)
        if args.json:
            tmp = args.json + ".tmp"
            with open(tmp, "w") as fh:
                json.dump(rows, fh, indent=1, default=float)
            os.replace(tmp, args.json)
    _table(rows)


def _table(rows: list[dict]) -> None:
    """The markdown table of benchmarks/README.md, "Dense confined phases"."""
    print()
    print(
        "| regime | method | density /nm^3 | spread (4 prep.) | box diff. | renewals (min) "
        "| required | exchanges / molecule (min) | certified | CPU s |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(
            f"| {r['regime']} | {r['method']} | {r['density_per_nm3']:.4g} | "
            f"{100 * r['spread_rel']:.2f} % | {100 * r['box_difference_rel']:+.2f} % | "
            f"{r['renewals_min']:.1f} | {r['min_renewals']} | "
            f"{r['exchanges_per_molecule_min']:.2g} | {'yes' if r['certified'] else 'no'} | "
            f"{r['cpu_s']:.0f} |"
        )


if __name__ == "__main__":
    main()
