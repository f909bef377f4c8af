"""Engine speed: trial moves per second of the numba engine against a C reference.

The C reference (benchmarks/engine_ref.c) is compiled here with the system's C compiler and
loaded with ctypes. It runs on the very arrays of a gcmc.sampling.box.Box, so both engines
start from the same configuration, cell list, parameters and xoshiro256** state and make
the same moves: each timed segment is the *same* trajectory run twice, once per engine
(checked: the final N and move counters must agree), alternating numba / C / C / numba ...
on one core. Times are the thread's CPU time (time.thread_time), so other jobs sharing the
machine slow both engines alike instead of stealing wall time from one of them; the best of
the repeats is reported for each engine, and the ratio is the median of the per-repeat
ratios.

States (Lennard-Jones units sigma, epsilon; argon-like probe epsilon/k = 119.8 K,
sigma = 0.3405 nm, Rowley, Nicholson & Parsonage 1975, as gcmc/physics/data/probes.toml):

- bulk rho* = 0.1 and 0.5 at T* = 2.0 (supercritical: a dilute gas and a dense fluid) and
  rho* = 0.8 at T* = 1.0 (compressed liquid, P* ~ 1), each with r_c = 2.5 and 5 sigma and the
  homogeneous tail correction. The activity comes from the full-potential LJ equation of
  state of Thol et al., J. Phys. Chem. Ref. Data 45 (2016) 023101 (teqp):
  z = rho exp(a_r + rho da_r/drho). The truncated-plus-tail model is close to the full one,
  so GCMC at that activity settles near the target density (the measured rho* is printed).
- slit pores H = 3 and 10 sigma (nucleus to nucleus, graphite walls of gcmc/physics/data/solids.toml
  values), T* = 87/119.8 = 0.726 (argon at 87 K), r_c = 3 sigma (project default, with the
  slab tail), lateral edge 12 sigma; activity 0.9 x the saturation activity of the same LJ
  equation of state (z_sat sigma^3 = 0.00262), which fills both pores with liquid.

States are prepared by GCMC itself: molecules on a jittered lattice at about the target
density, then GCMC moves at the state's activity with the displacement step adapted to 40 %
acceptance, before any timing. The moves timed are the default GCMC mix (50 % displacement,
25 % insertion, 25 % deletion, plain insertion).

"Flat cost per move": each state is repeated with 8 x the molecules (same density; bulk edge
x 2, started from 2 x 2 x 2 copies of the prepared small box; slit lateral edge x sqrt(8),
prepared from a lattice); the numba moves/s there should be within 20 % of the small system.

Usage:
    python benchmarks/bench_engine.py            # full run, a few minutes on one core
    python benchmarks/bench_engine.py --quick    # fewer repeats, no 8x systems
    python benchmarks/bench_engine.py --states bulk-0.8-rc2.5,slit-H10
"""

from __future__ import annotations

import argparse
import copy
import ctypes
import hashlib
import json
import math
import os
import platform
import shutil
import subprocess
import sys
import time
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
BUILD = HERE / "_build"
SOURCE = HERE / "engine_ref.c"

#: Compiler flags of the reference: -ffast-math matches numba's fastmath=True on the pair
#: loop (both may reassociate the pair sums, which is what lets a compiler vectorise a
#: reduction); see README.md for the same code without it.
CFLAGS = ["-O3", "-march=native", "-ffast-math", "-fPIC", "-shared"]
#: Pair-loop forms of the reference (see engine_ref.c); 7 is the numba engine's own form.
C_VARIANTS = (1, 2, 3, 4, 5, 6, 7)
DEFAULT_C_VARIANT = 7
SAME_FORM = f"c{DEFAULT_C_VARIANT}"

EPS_K = 119.8
SIGMA_NM = 0.3405
T_SLIT = 87.0 / EPS_K
SLIT_EDGE_SIGMA = 12.0
SLIT_CUTOFF_SIGMA = 3.0
SLIT_ACTIVITY_FRACTION = 0.9
#: GCMC sweeps (moves per molecule) before timing. A simple-cubic start at rho* = 0.8 first
#: loses ~10 % of its molecules and needs some 800 sweeps to refill (checked by hand).
PREP_SWEEPS = 1000.0
#: 8 x systems: bulk ones start from 2 x 2 x 2 copies of the prepared small box (already at
#: the density), slits from a lattice of 8 x the small pore's molecules
PREP_SWEEPS_X8 = {"bulk": 20.0, "slit": 1000.0}


@dataclass(frozen=True)
class StateSpec:
    name: str
    geometry: str  # "bulk" or "slit"
    t_red: float  # T* = kT/eps
    cutoff_sigma: float
    edge_sigma: float  # bulk cube edge / slit lateral edge
    rho_red: float = 0.0  # bulk target density rho sigma^3
    width_sigma: float = 0.0  # slit H / sigma

    def scaled(self) -> StateSpec:
        """The same state with 8 x the volume (so 8 x the molecules)."""
        f = 2.0 if self.geometry == "bulk" else math.sqrt(8.0)
        return StateSpec(
            self.name + "-x8",
            self.geometry,
            self.t_red,
            self.cutoff_sigma,
            self.edge_sigma * f,
            self.rho_red,
            self.width_sigma,
        )


def default_states() -> list[StateSpec]:
    states = []
    for rho, t in ((0.1, 2.0), (0.5, 2.0), (0.8, 1.0)):
        for rc in (2.5, 5.0):
            states.append(
                StateSpec(f"bulk-{rho}-rc{rc}", "bulk", t, rc, max(10.0, 3.0 * rc), rho_red=rho)
            )
    for h in (3.0, 10.0):
        states.append(
            StateSpec(
                f"slit-H{h:g}", "slit", T_SLIT, SLIT_CUTOFF_SIGMA, SLIT_EDGE_SIGMA, width_sigma=h
            )
        )
    return states


# ---------------------------------------------------------------------------------------
# C reference


def compile_reference(variant: int = DEFAULT_C_VARIANT, fast_math: bool = True) -> Path:
    """Compile engine_ref.c into benchmarks/_build (rebuilt when source or flags change)."""
    cc = os.environ.get("CC") or shutil.which("cc") or shutil.which("gcc")
    if cc is None:
        raise RuntimeError("no C compiler (cc) found on PATH")
    flags = [f for f in CFLAGS if fast_math or f != "-ffast-math"] + [f"-DPAIR_LOOP={variant}"]
    key = hashlib.sha256(SOURCE.read_bytes() + " ".join([cc] + flags).encode()).hexdigest()[:12]
    BUILD.mkdir(exist_ok=True)
    out = BUILD / f"engine_ref_v{variant}{'_fm' if fast_math else ''}_{key}.so"
    if not out.exists():
        tmp = out.with_suffix(".tmp.so")
        subprocess.run([cc, *flags, str(SOURCE), "-o", str(tmp), "-lm"], check=True)
        tmp.replace(out)
    return out


class Reference:
    """ctypes wrapper of ref_run_moves."""

    def __init__(self, path: Path, engine_module):
        lib = ctypes.CDLL(str(path))
        self.path = path
        E = engine_module
        lib.ref_layout_check.restype = ctypes.c_int64
        if lib.ref_layout_check() != E.N_FPARAMS * 1000 + E.N_IPARAMS:
            raise RuntimeError("engine_ref.c parameter layout differs from gcmc.sampling.engine")
        f = lib.ref_run_moves
        f.restype = ctypes.c_int64
        f.argtypes = [ctypes.c_int64] + [ctypes.c_void_p] * 14 + [ctypes.c_int64] * 2
        self._f = f

    def run(self, box, n_moves: int) -> None:
        arrays = (
            box.fp,
            box.ip,
            box.cell_xyz,
            box.cell_n,
            box.cell_pid,
            box.pid_cell,
            box.pid_slot,
            box.nbr,
            box.nbr_n,
            box.zbin_n,
            box.tail_table,
            box.rng,
            box.energy,
            box.counters,
        )
        for a in arrays:
            if not a.flags.c_contiguous:
                raise RuntimeError("Box arrays must be C-contiguous")
        if (
            self._f(
                int(n_moves),
                *[a.ctypes.data for a in arrays],
                box.cell_xyz.shape[2],
                box.nbr.shape[1],
            )
            != 0
        ):
            raise RuntimeError("C reference refused the state (k_trials too large)")


def clone(box):
    """An independent copy of a Box (all its arrays copied)."""
    b = copy.copy(box)
    for k, v in vars(box).items():
        if isinstance(v, np.ndarray):
            setattr(b, k, v.copy())
    return b


# ---------------------------------------------------------------------------------------
# states


def lj_activity(t_red: float, rho_red: float) -> float:
    """z sigma^3 = rho exp(beta mu_res) from the Thol et al. (2016) LJ EOS (teqp)."""
    import teqp

    m = teqp.make_model({"kind": "LJ126_TholJPCRD2016", "model": {}})
    x = np.array([1.0])
    return rho_red * math.exp(m.get_Ar00(t_red, rho_red, x) + m.get_Ar01(t_red, rho_red, x))


def lj_saturation_activity(t_red: float) -> float:
    """z_sat sigma^3 at coexistence, same EOS (teqp's pure VLE solver)."""
    import teqp

    m = teqp.make_model({"kind": "LJ126_TholJPCRD2016", "model": {}})
    rho_l, rho_v = m.pure_VLE_T(t_red, 0.83, 0.002, 100)
    x = np.array([1.0])
    return rho_v * math.exp(m.get_Ar00(t_red, rho_v, x) + m.get_Ar01(t_red, rho_v, x))


def _lattice(n: int, lo: np.ndarray, hi: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """n points of a jittered simple-cubic lattice filling the box [lo, hi)."""
    span = hi - lo
    k = np.maximum(1, np.ceil(span * (n / np.prod(span)) ** (1.0 / 3.0)).astype(int))
    while np.prod(k) < n:
        k[np.argmax(span / k)] += 1
    g = np.stack(np.meshgrid(*[(np.arange(m) + 0.5) / m for m in k], indexing="ij"), -1)
    pts = lo + g.reshape(-1, 3) * span
    pts = pts[rng.permutation(len(pts))[:n]]
    return pts + rng.uniform(-0.05, 0.05, pts.shape) * (span / k)


def make_state(spec: StateSpec, prep_sweeps: float, cells_per_cutoff: int = 1, tile_from=None):
    """A Box at the state, equilibrated by GCMC (see the module docstring). With
    ``tile_from`` (the prepared small Box), start from 2 x 2 x 2 copies of it (bulk) or from
    a lattice of 8 x its molecules (slit)."""
    from gcmc.physics.model import BULK, SLIT, PoreModel, Probe, Solid
    from gcmc.sampling.box import Box, EngineOptions
    from gcmc.sampling.rng import seed_state

    seed = zlib.crc32(spec.name.encode())

    sig = SIGMA_NM
    probe = Probe(name="argon-like", epsilon_k=EPS_K, sigma_nm=sig)
    edge = spec.edge_sigma * sig
    rng = np.random.default_rng(seed)
    if spec.geometry == "bulk":
        model = PoreModel(
            probe=probe,
            solid=Solid(),
            geometry=BULK,
            cutoff_nm=spec.cutoff_sigma * sig,
            box_nm=edge,
        )
        z_red = lj_activity(spec.t_red, spec.rho_red)
        n0 = int(round(spec.rho_red * spec.edge_sigma**3))
        lo, hi = np.zeros(3), np.full(3, edge)
    else:
        h = spec.width_sigma * sig
        model = PoreModel(
            probe=probe,
            solid=Solid(),
            geometry=SLIT,
            cutoff_nm=spec.cutoff_sigma * sig,
            box_nm=edge,
            width_nm=h,
        )
        z_red = SLIT_ACTIVITY_FRACTION * lj_saturation_activity(spec.t_red)
        # liquid (rho* ~ 0.75) between the planes where the wall potential is attractive
        margin = 0.85 * model.solid_fluid.sigma_nm
        lo = np.array([0.0, 0.0, margin])
        hi = np.array([edge, edge, max(h - margin, margin + 0.3 * sig)])
        n0 = int(0.75 * np.prod(hi - lo) / sig**3)
        if tile_from is not None:  # 8 x the molecules of the prepared small pore
            n0 = 8 * tile_from.n_molecules
    box = Box(
        model,
        spec.t_red * EPS_K,
        z_red / sig**3,
        EngineOptions(cells_per_cutoff=cells_per_cutoff),
        rng_state=seed_state(seed),
        max_displacement_nm=0.15 * sig,
    )
    if tile_from is not None and spec.geometry == "bulk":
        small = tile_from.positions()
        half = tile_from.model.box_nm
        shifts = np.array([(i, j, k) for i in (0, 1) for j in (0, 1) for k in (0, 1)]) * half
        box.load_positions((small[None, :, :] + shifts[:, None, :]).reshape(-1, 3))
        box.max_displacement_nm = tile_from.max_displacement_nm
    else:
        box.load_positions(_lattice(max(n0, 1), lo, hi, rng))
    # equilibrate: displacement step adapted to 40 % acceptance (as gcmc.sampling.point does)
    n_moves = int(prep_sweeps * max(box.n_molecules, 50))
    for _ in range(10):
        box.reset_counters()
        box.run(max(1, n_moves // 10))
        a = box.acceptance()["displacement"]
        if math.isfinite(a):
            box.max_displacement_nm = float(
                np.clip(
                    box.max_displacement_nm * np.clip(a / 0.4, 0.5, 1.5), 0.01 * sig, 0.5 * edge
                )
            )
    box.reset_counters()
    box.energy[:] = box.recomputed_energy()
    return box


def reduced_density(box) -> float:
    model = box.model
    vol = model.volume_nm3 if model.geometry == "bulk" else model.pore_volume_nm3
    return box.n_molecules / vol * SIGMA_NM**3


# ---------------------------------------------------------------------------------------
# timing


def time_engines(box, engines: dict, n_moves: int, repeats: int) -> dict:
    """Time each engine (name -> run(box, n)) on clones of ``box``, the same trajectory for
    all, in an order that rotates between repeats; CPU time of this thread per run.

    Returns, per engine, the best moves/s and the per-repeat time ratios to the first
    engine, and whether all engines ended in the same state (N and move counters)."""
    names = list(engines)
    times: dict[str, list[float]] = {k: [] for k in names}
    same = True
    for rep in range(repeats):
        order = names[rep % len(names) :] + names[: rep % len(names)]
        if rep % 2:
            order = order[::-1]
        ends = {}
        for which in order:
            b = clone(box)
            t0 = time.thread_time()
            engines[which](b, n_moves)
            times[which].append(time.thread_time() - t0)
            ends[which] = (b.n_molecules, b.counters.copy())
        first = ends[names[0]]
        same &= all(n == first[0] and np.array_equal(c, first[1]) for n, c in ends.values())
    base = np.array(times[names[0]])
    out = {"same_trajectory": same}
    for k in names:
        r = np.array(times[k]) / base  # > 1: engine k slower than engines[0]
        out[k] = {
            "moves_per_s": n_moves / min(times[k]),
            "time_ratio_median": float(np.median(r)),
            "time_ratio_min": float(r.min()),
            "time_ratio_max": float(r.max()),
        }
    return out


def time_numba(box, n_moves: int, repeats: int) -> float:
    ts = []
    for _ in range(repeats):
        b = clone(box)
        t0 = time.thread_time()
        b.run(n_moves)
        ts.append(time.thread_time() - t0)
    return n_moves / min(ts)


def calibrate(box, seconds: float) -> int:
    """Moves for a timed segment of about ``seconds`` of numba time."""
    n = 2000
    while True:
        b = clone(box)
        t0 = time.thread_time()
        b.run(n)
        dt = time.thread_time() - t0
        if dt > 0.02 or n > 10_000_000:
            return max(1000, int(n * seconds / max(dt, 1e-9)))
        n *= 4


def bookkeeping(box, run, n_moves: int) -> float:
    """Relative difference of the running energy and a full recomputation after n moves."""
    b = clone(box)
    run(b, n_moves)
    uff, usf = b.recomputed_energy()
    tot = abs(uff) + abs(usf)
    return (abs(b.energy[0] - uff) + abs(b.energy[1] - usf)) / max(tot, 1e-300)


def machine_summary() -> dict:
    info = {"python": platform.python_version(), "platform": platform.platform()}
    try:
        import llvmlite.binding as ll
        import numba

        info["numba"] = numba.__version__
        info["llvm"] = ".".join(map(str, ll.llvm_version_info))
        info["llvm_cpu"] = ll.get_host_cpu_name()
    except Exception:  # pragma: no cover - informational only
        pass
    try:
        out = subprocess.run(["lscpu"], capture_output=True, text=True, check=True).stdout
        for line in out.splitlines():
            k, _, v = line.partition(":")
            if k.strip() in ("Model name", "CPU(s)", "L1d cache", "L2 cache", "L3 cache"):
                info[k.strip()] = v.strip()
    except Exception:  # pragma: no cover
        pass
    cc = os.environ.get("CC") or shutil.which("cc") or "cc"
    try:
        info["cc"] = subprocess.run(
            [cc, "--version"], capture_output=True, text=True, check=True
        ).stdout.splitlines()[0]
    except Exception:  # pragma: no cover
        info["cc"] = cc
    return info


def _parse_variants(text: str) -> list[int]:
    try:
        v = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        v = []
    if not v or any(x not in C_VARIANTS for x in v):
        raise SystemExit(f"--c-variants: expected a comma list from {C_VARIANTS}, got {text!r}")
    return v


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument(
        "--quick", action="store_true", help="fewer repeats, one C variant, no 8x systems"
    )
    ap.add_argument("--states", default="", help="comma-separated state names (default: all)")
    ap.add_argument("--repeats", type=int, default=0, help="timed repeats per engine")
    ap.add_argument("--seconds", type=float, default=0.0, help="numba seconds per segment")
    ap.add_argument(
        "--c-variants",
        default="",
        help="pair-loop forms of the C reference to time (default: all; the "
        "fastest per state is the reference)",
    )
    ap.add_argument("--no-fast-math", action="store_true", help="compile C without -ffast-math")
    ap.add_argument("--no-scaling", action="store_true", help="skip the 8x systems")
    ap.add_argument(
        "--cells-per-cutoff", type=int, default=1, help="engine option: cell edge >= r_c / this"
    )
    ap.add_argument(
        "--bookkeeping-moves",
        type=int,
        default=1_000_000,
        help="numba moves per state before comparing box.energy with a full recomputation",
    )
    ap.add_argument(
        "--gcmc",
        default="",
        help="import gcmc from this directory instead (to time a variant of the engine)",
    )
    ap.add_argument("--json", default="", help="write the results to this JSON file")
    args = ap.parse_args(argv)
    sys.path.insert(0, str(Path(args.gcmc).resolve()) if args.gcmc else str(HERE.parent))
    from gcmc.sampling import engine as E
    from gcmc.sampling.box import warm_up

    repeats = args.repeats or (4 if args.quick else 5)
    seconds = args.seconds or (0.1 if args.quick else 0.12)
    scaling = not (args.quick or args.no_scaling)
    variants = _parse_variants(
        args.c_variants
        or (str(DEFAULT_C_VARIANT) if args.quick else ",".join(map(str, C_VARIANTS)))
    )
    states = default_states()
    if args.states:
        want = args.states.split(",")
        unknown = set(want) - {s.name for s in states}
        if unknown:
            ap.error(f"--states: unknown {sorted(unknown)}; known: {[s.name for s in states]}")
        states = [s for s in states if s.name in want]

    t_start = time.perf_counter()
    refs = {f"c{v}": Reference(compile_reference(v, not args.no_fast_math), E) for v in variants}
    engines = {"numba": lambda b, n: b.run(n)}
    engines.update({k: r.run for k, r in refs.items()})
    warm = warm_up()
    print(
        f"# numba warm-up {warm:.1f} s; C reference variants {', '.join(refs)} "
        f"({' '.join(CFLAGS)}{' without -ffast-math' if args.no_fast_math else ''})",
        flush=True,
    )
    rows = []
    header = (
        f"{'state':<16}{'N':>6}{'rho*':>7}{'numba/s':>10}{'C/s':>10}{'best':>5}"
        f"{'numba/C':>8}{'range':>11}{'/c7':>6}{'same':>5}{'dE/E':>8}"
    )
    if len(refs) > 1:
        header += "  C variants (moves/s)"
    if scaling:
        header += f"{'N x8':>8}{'x8/s':>9}{'x8/x1':>6}"
    print(header, flush=True)
    for spec in states:
        box = make_state(spec, PREP_SWEEPS, args.cells_per_cutoff)
        box.run(1000)  # compile for this state's argument types (no-op after warm-up)
        n_moves = calibrate(box, seconds)
        t = time_engines(box, engines, n_moves, repeats)
        probe = clone(box)
        probe.reset_counters()
        probe.run(n_moves)  # acceptance ratios over one timed segment
        best = max(refs, key=lambda k: t[k]["moves_per_s"])
        ratio = t[best]["time_ratio_median"]  # t_C / t_numba = numba speed / C speed
        err_nb = bookkeeping(box, engines["numba"], max(20 * n_moves, args.bookkeeping_moves))
        err_c = bookkeeping(box, refs[best].run, 20 * n_moves)
        row = {
            "state": spec.name,
            "geometry": spec.geometry,
            "T_red": spec.t_red,
            "cutoff_sigma": spec.cutoff_sigma,
            "edge_sigma": spec.edge_sigma,
            "width_sigma": spec.width_sigma,
            "N": box.n_molecules,
            "rho_red": reduced_density(box),
            "moves": n_moves,
            "cells": list(box.n_cells_xyz),
            "acceptance": probe.acceptance(),
            "bookkeeping_numba": err_nb,
            "bookkeeping_c": err_c,
            "numba_moves_per_s": t["numba"]["moves_per_s"],
            "c_best": best,
            "c_moves_per_s": t[best]["moves_per_s"],
            "numba_over_c": ratio,
            "numba_over_c_min": t[best]["time_ratio_min"],
            "numba_over_c_max": t[best]["time_ratio_max"],
            "same_trajectory": t["same_trajectory"],
            "c_variants": {k: t[k]["moves_per_s"] for k in refs},
            "numba_over_c_same_form": t[SAME_FORM]["time_ratio_median"]
            if SAME_FORM in refs
            else float("nan"),
        }
        line = (
            f"{spec.name:<16}{box.n_molecules:>6}{row['rho_red']:>7.3f}"
            f"{row['numba_moves_per_s']:>10.3g}{row['c_moves_per_s']:>10.3g}{best:>5}"
            f"{ratio:>8.2f}{row['numba_over_c_min']:>6.2f}-{row['numba_over_c_max']:<4.2f}"
            f"{row['numba_over_c_same_form']:>6.2f}"
            f"{'yes' if row['same_trajectory'] else 'no':>5}{max(err_nb, err_c):>8.0e}"
        )
        if len(refs) > 1:
            line += "  " + " ".join(f"{k}:{v:.3g}" for k, v in row["c_variants"].items())
        if scaling:
            big = make_state(
                spec.scaled(), PREP_SWEEPS_X8[spec.geometry], args.cells_per_cutoff, box
            )
            big.run(1000)
            tt = time_engines(big, {"numba": engines["numba"]}, n_moves, repeats)
            nb8 = tt["numba"]["moves_per_s"]
            nb1 = time_engines(box, {"numba": engines["numba"]}, n_moves, repeats)
            nb1 = nb1["numba"]["moves_per_s"]
            row.update(
                {
                    "N_x8": big.n_molecules,
                    "rho_red_x8": reduced_density(big),
                    "numba_x8_moves_per_s": nb8,
                    "numba_x1_moves_per_s_again": nb1,
                    "x8_over_x1": nb8 / nb1,
                }
            )
            line += f"{big.n_molecules:>8}{nb8:>9.3g}{nb8 / nb1:>6.2f}"
        print(line, flush=True)
        rows.append(row)
    total = time.perf_counter() - t_start
    ratios = [r["numba_over_c"] for r in rows]
    print(
        f"# numba/C (median of the repeats, against the fastest C variant per state): "
        f"{min(ratios):.2f} .. {max(ratios):.2f}; wall time {total:.0f} s",
        flush=True,
    )
    if scaling:
        sc = [r["x8_over_x1"] for r in rows]
        print(f"# flat cost: numba moves/s x8 / x1 = {min(sc):.2f} .. {max(sc):.2f}", flush=True)
    if args.json:
        out = {
            "machine": machine_summary(),
            "cflags": CFLAGS,
            "fast_math": not args.no_fast_math,
            "c_variants": variants,
            "repeats": repeats,
            "rows": rows,
            "wall_seconds": total,
        }
        Path(args.json).write_text(json.dumps(out, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
