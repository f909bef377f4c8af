"""Benchmark: evaluating a kernel matrix with gcmc.reader (numpy + h5py only).

Builds an invented demo kernel (100 widths, 2 temperatures, 40 simulated pressures, a mix of
correlating forms and monotone interpolants), writes it, opens it, and times
``Kernel.evaluate`` for 200 pressures x 100 widths (between and at kernel widths, with
pressures below, inside and above the simulated range): the cold call (fresh Kernel, empty
cache), the warm call (same pressures again) and the excess quantity. Reports the median of
repeats in ms. Not a timed test; run it by hand:

    python benchmarks/bench_reader.py [--repeats 21]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from gcmc.kernel import forms
from gcmc.kernel.data import FitRecord, KernelData
from gcmc.kernel.reader import open_kernel
from gcmc.kernel.writer import config_hash, write_kernel

K_B = 1.380649e-23


def demo_kernel(n_w: int = 100, n_p: int = 40) -> KernelData:
    """An invented kernel: Langmuir, Toth and two-step isotherms with constants smooth in H,
    every fifth pore stored as a monotone interpolant, the narrowest pore inaccessible."""
    temps = np.array([150.0, 200.0])
    h = np.linspace(0.30, 3.0, n_w)
    p = np.tile(np.geomspace(1e2, 5e6, n_p), (temps.size, 1))
    shape = (temps.size, n_w, n_p)
    dens = np.zeros(shape)
    henry = np.zeros((temps.size, n_w))
    fits = []
    for t, temp in enumerate(temps):
        row = []
        for j, hj in enumerate(h):
            if j == 0:
                row.append(
                    FitRecord(
                        "zero",
                        np.empty(0),
                        np.empty((0, 0)),
                        0.0,
                        n_p,
                        0.0,
                        1.0,
                        0.0,
                        np.zeros(n_p),
                        True,
                    )
                )
                continue
            n_m = 18.0 + 6.0 * np.tanh(2.0 * (hj - 0.9))
            b = 2e-5 * np.exp((900.0 / temp) * (0.6 / hj))
            kind = j % 3
            if kind == 0:
                name, par = "langmuir", np.array([n_m, b])
            elif kind == 1:
                name, par = "toth", np.array([n_m, b, 0.7])
            else:
                name, par = "multi_step_2", np.array([0.4 * n_m, b, 0.6 * n_m, 0.05 * b, 3.0])
            n = forms.FORMS[name].evaluate(par, p[t])
            dens[t, j] = n
            henry[t, j] = forms.FORMS[name].henry_constant(par)
            if j % 5 == 0:
                name, par = "monotone_interpolant", forms.pack_interpolant(p[t], n)
            k = par.size
            row.append(
                FitRecord(
                    name,
                    par,
                    np.eye(k) * 1e-6,
                    float(n_p - k),
                    n_p - k,
                    1.0,
                    0.5,
                    float(n_p),
                    np.zeros(n_p),
                    name != "monotone_interpolant",
                )
            )
        fits.append(row)
    bulk = p / (K_B * temps[:, None]) / 1e27
    config = "# invented benchmark config\n"
    nan = np.full(shape, np.nan)
    return KernelData(
        name="bench",
        version=1,
        probe={"name": "demo-probe", "epsilon_k": 120.0, "sigma_nm": 0.34},
        solid={"name": "graphite"},
        cutoff_nm=1.7,
        box_nm=3.6,
        tail_correction="slab",
        eos="ideal",
        eos_parameters={},
        width_convention="internal: w = H - sigma_ss",
        pore_volume_convention="A * w",
        sampler="gcmc-ladder",
        temperatures_K=temps,
        widths_H_nm=h,
        widths_w_nm=h - 0.34,
        pressures_Pa=p,
        relative_pressures=np.full(p.shape, np.nan),
        saturation_pressures_Pa=np.full(temps.size, np.nan),
        fugacities_Pa=p.copy(),
        bulk_density_per_nm3=bulk,
        points={
            "adsorption": {
                "density_per_nm3": dens,
                "density_per_nm3_stderr": 0.01 * dens,
                "excess_density_per_nm3": dens - bulk[:, None, :],
                "isosteric_heat_kJ_per_mol": nan,
            }
        },
        flags={"adsorption": np.full(shape, "", dtype=object)},
        henry_per_nm3_per_pa=henry,
        accessible=henry > 0,
        fits=fits,
        above_range="clamp",
        dense_pressures_Pa=p.copy(),
        dense_density_per_nm3=dens.copy(),
        config_text=config,
        provenance={"config_hash": config_hash(config)},
        task_seeds=np.zeros((temps.size, n_w), dtype=np.uint64),
        task_seconds=np.zeros((temps.size, n_w)),
    )


def _median_ms(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return 1e3 * float(np.median(times))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=21)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        path = write_kernel(demo_kernel(), Path(tmp))
        t_write = time.perf_counter() - t0
        t0 = time.perf_counter()
        kernel = open_kernel(path)
        t_open = time.perf_counter() - t0
        size_kb = path.stat().st_size / 1024
        p = np.geomspace(10.0, 1e7, 200)  # below, inside and above 1e2 .. 5e6 Pa
        w = np.linspace(kernel.widths_w_nm[0], kernel.widths_w_nm[-1], 100)
        temp = 150.0

        def cold() -> None:
            kernel._cache.clear()  # a fresh Kernel: no per-width evaluation cached
            kernel.evaluate(p, w, temp)

        cold_ms = _median_ms(cold, args.repeats)
        kernel.evaluate(p, w, temp)
        warm_ms = _median_ms(lambda: kernel.evaluate(p, w, temp), args.repeats)
        excess_ms = _median_ms(lambda: kernel.evaluate(p, w, temp, quantity="excess"), args.repeats)
        m = kernel.evaluate(p, w, temp)
    print(
        f"kernel file: 2 T x 100 W x 40 P, {size_kb:.0f} kB; write {1e3 * t_write:.0f} ms "
        f"(incl. verification), open+verify {1e3 * t_open:.0f} ms"
    )
    print(f"kernel matrix {m.shape[0]} pressures x {m.shape[1]} widths (median of {args.repeats}):")
    print(f"  cold (empty cache)   {cold_ms:8.2f} ms")
    print(f"  warm (cached widths) {warm_ms:8.2f} ms")
    print(f"  excess, warm         {excess_ms:8.2f} ms")
    print(f"  finite entries: {np.isfinite(m).mean():.0%}")


if __name__ == "__main__":
    main()
