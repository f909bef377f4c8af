"""Synthetic kernels for the set checks (invented test data, built in code).

Each pore holds a Langmuir isotherm n = n_m b p / (1 + b p) (I. Langmuir, J. Am. Chem. Soc. 40
(1918) 1361) whose affinity b(w) is chosen so that the answer is known by construction:
* ``small_probe``: enters every pore from w = 0.3 nm; b = 1e-5 (1 + 40 exp(-(w - 0.3)/0.12 nm))
  falls steeply with w below ~1 nm and is nearly constant above (no width information above ~1 nm);
* ``large_probe``: enters pores from w = 0.7 nm only (molecular sieving); b falls as
  exp(-2 w / nm) over the whole range (width information in wide pores).
The "simulated" points carry a stated relative standard error and sit on the exact isotherm
(or scatter with seeded Gaussian noise); the fits are the exact generating parameters.
"""

from __future__ import annotations

import numpy as np

from gcmc.kernel import forms as F
from gcmc.kernel.data import POINT_FIELDS, FitRecord, KernelData
from gcmc.physics.units import BOLTZMANN_J_PER_K, NM3_PER_M3

T = 298.15
SIGMA_SS = 0.34
PRESSURES = np.geomspace(1e2, 1e6, 24)
WIDTHS = np.round(np.linspace(0.25, 2.5, 46), 6)
REL_ERR = 0.004


def small_probe(w: float) -> np.ndarray:
    return np.array([20.0, 1e-5 * (1.0 + 40.0 * np.exp(-(w - 0.3) / 0.12))])


def large_probe(w: float) -> np.ndarray:
    return np.array([12.0, 3e-4 * np.exp(-2.0 * (w - 0.7))])


def synthetic_kernel(
    widths_w,
    pressures,
    params,
    form: str,
    inaccessible,
    rel_err: float,
    rng: np.random.Generator | None,
    n_dense: int,
    name: str,
    probe: str,
    config_text: str,
    temperature: float = T,
    solid_sigma: float = SIGMA_SS,
    width_convention: str = "internal: w = H - sigma_ss",
    pore_volume_convention: str = "A * w (w = H - sigma_ss)",
) -> KernelData:
    """A one-temperature KernelData whose fits are the exact ``form`` isotherms of
    ``params(w)`` and whose points sit on them with relative standard error ``rel_err``
    (plus seeded Gaussian scatter when ``rng`` is given); widths flagged in ``inaccessible``
    (one bool per width) are empty pores with a "zero" fit. Shared by tests/test_check.py."""
    widths_w = np.asarray(widths_w, float)
    p = np.asarray(pressures, float)
    nw, n_p = widths_w.size, p.size
    beta = 1.0 / (BOLTZMANN_J_PER_K * temperature) / NM3_PER_M3
    pts = {f: np.full((1, nw, n_p), np.nan) for f in POINT_FIELDS}
    fits, henry = [], np.zeros((1, nw))
    acc = np.ones((1, nw), bool)
    dense_p = np.geomspace(p[0] / 100, p[-1], n_dense)
    dense = np.zeros((1, nw, dense_p.size))
    for j, w in enumerate(widths_w):
        if inaccessible[j]:
            acc[0, j] = False
            pts["density_per_nm3"][0, j] = 0.0
            pts["density_per_nm3_stderr"][0, j] = 0.0
            fits.append(
                FitRecord(
                    "zero",
                    np.zeros(0),
                    np.zeros((0, 0)),
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
        par = params(w)
        exact = F.evaluate_fit(form, par, p)
        err = rel_err * exact
        obs = exact + (err * rng.standard_normal(n_p) if rng is not None else 0.0)
        pts["density_per_nm3"][0, j] = obs
        pts["density_per_nm3_stderr"][0, j] = err
        r = (obs - exact) / err
        dof = n_p - par.size
        fits.append(
            FitRecord(
                form,
                par,
                np.zeros((par.size, par.size)),
                float(r @ r),
                dof,
                float(r @ r) / dof,
                0.5,
                0.0,
                r,
                True,
            )
        )
        henry[0, j] = F.FORMS[form].henry_constant(par)
        dense[0, j] = F.evaluate_fit(form, par, dense_p)
    pts["converged"] = np.ones((1, nw, n_p), bool)
    pts["excess_density_per_nm3"][0] = pts["density_per_nm3"][0] - beta * p
    return KernelData(
        name=name,
        version=1,
        probe={"name": probe, "epsilon_k": 150.0, "sigma_nm": 0.37},
        solid={
            "name": "graphite",
            "density_nm3": 114.0,
            "interlayer_nm": 0.335,
            "epsilon_k": 28.0,
            "sigma_nm": solid_sigma,
            "epsilon_sf_scale": 1.0,
        },
        cutoff_nm=1.2,
        box_nm=3.0,
        tail_correction="none",
        eos="ideal",
        eos_parameters={},
        width_convention=width_convention,
        pore_volume_convention=pore_volume_convention,
        sampler="synthetic",
        temperatures_K=np.array([temperature]),
        widths_H_nm=widths_w + solid_sigma,
        widths_w_nm=widths_w,
        pressures_Pa=p[None, :].copy(),
        relative_pressures=np.full((1, n_p), np.nan),
        saturation_pressures_Pa=np.array([np.nan]),
        fugacities_Pa=p[None, :].copy(),
        bulk_density_per_nm3=beta * p[None, :],
        points={"adsorption": pts},
        flags={"adsorption": np.full((1, nw, n_p), "", dtype="<U64")},
        henry_per_nm3_per_pa=henry,
        accessible=acc,
        fits=[fits],
        above_range="clamp",
        dense_pressures_Pa=dense_p[None, :],
        dense_density_per_nm3=dense,
        config_text=config_text,
        provenance={"synthetic": True},
        task_seeds=np.zeros((1, nw, 3), np.uint64),
        task_seconds=np.zeros((1, nw)),
    )


def make_set_kernel(
    params,
    smallest_w: float,
    name: str,
    probe: str,
    widths=WIDTHS,
    pressures=PRESSURES,
    width_convention: str = "internal: w = H - sigma_ss",
    pore_volume_convention: str = "A * w (w = H - sigma_ss)",
    solid_sigma: float = SIGMA_SS,
    rel_err: float = REL_ERR,
    noise_seed: int | None = None,
    temperature: float = T,
) -> KernelData:
    widths = np.asarray(widths, float)
    return synthetic_kernel(
        widths,
        pressures,
        params,
        "langmuir",
        [w < smallest_w - 1e-12 for w in widths],
        rel_err,
        np.random.default_rng(noise_seed) if noise_seed is not None else None,
        30,
        name,
        probe,
        "# synthetic set-test kernel (invented)",
        temperature=temperature,
        solid_sigma=solid_sigma,
        width_convention=width_convention,
        pore_volume_convention=pore_volume_convention,
    )


def small() -> KernelData:
    return make_set_kernel(small_probe, 0.3, "small-probe", "smallgas")


def large() -> KernelData:
    return make_set_kernel(large_probe, 0.7, "large-probe", "largegas")
