"""Exact low-pressure limit of a slit pore: the Henry constant by quadrature of the wall
potential's Boltzmann factor, and the accessibility of a pore to the probe.

In the Henry regime the molecules interact with the walls only, so the mean number in a box
of area A is N = beta f A int_0^H exp(-beta V(z)) dz, and the density per pore volume A w is
n = K_H f with K_H = beta int exp(-beta V) dz / w (an exact limit of the model; see e.g.
Steele, The Interaction of Gases with Solid Surfaces, 1974).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import integrate, optimize

from gcmc.physics.model import PoreModel
from gcmc.physics.potentials import steele_prefactor_k
from gcmc.physics.units import BOLTZMANN_J_PER_K, NM3_PER_M3

#: A width is inaccessible when the pore potential is repulsive everywhere: min V(z) > 0.
#: Such a pore is given zero loading without simulation once min beta V exceeds this (the
#: Boltzmann factor is then below 2e-9 everywhere and no molecule can be found in it).
INACCESSIBLE_BETA_V = 20.0


def _wall(z: np.ndarray, model: PoreModel) -> np.ndarray:
    sf = model.solid_fluid
    pre = steele_prefactor_k(model)
    d = model.solid.interlayer_nm
    s = sf.sigma_nm

    def one(zz: np.ndarray) -> np.ndarray:
        sz2 = (s / zz) ** 2
        sz4 = sz2 * sz2
        return pre * (0.4 * sz4 * sz4 * sz2 - sz4 - s**4 / (3.0 * d * (zz + 0.61 * d) ** 3))

    z = np.asarray(z, dtype=float)
    return one(z) + one(model.width_nm - z)


@dataclass(frozen=True)
class PoreLimit:
    """The exact low-pressure limit of one pore at one temperature: the Boltzmann integral of
    the wall potential, the Henry constant and whether the pore admits the probe."""

    width_nm: float
    temperature_K: float
    boltzmann_integral_nm: float  # int_0^H exp(-beta V(z)) dz
    henry_per_nm3_per_pa: float  # K_H: density per pore volume per Pa of fugacity
    minimum_potential_k: float  # min_z V(z)
    accessible: bool  # min V < 0

    @property
    def blocked(self) -> bool:
        """So repulsive that nothing can enter: zero loading without simulation."""
        return self.minimum_potential_k / self.temperature_K > INACCESSIBLE_BETA_V


def pore_limit(model: PoreModel, temperature_k: float) -> PoreLimit:
    """Henry constant and accessibility of the slit pore of ``model`` at temperature T."""
    h = model.width_nm
    beta = 1.0 / temperature_k
    # The potential is symmetric about H/2; find its minimum on (0, H/2].
    zs = np.linspace(1e-3 * h, 0.5 * h, 4001)
    v = _wall(zs, model)
    k = int(np.argmin(v))
    lo, hi = zs[max(k - 1, 0)], zs[min(k + 1, len(zs) - 1)]
    res = optimize.minimize_scalar(
        lambda z: float(_wall(np.array([z]), model)[0]),
        bounds=(lo, hi),
        method="bounded",
        options={"xatol": 1e-12},
    )
    z_min, v_min = float(res.x), float(min(res.fun, v[k]))
    # Integrate over the half pore where the Boltzmann factor is not negligible.
    bv = beta * (v - v_min)
    idx = np.nonzero(bv < 60.0)[0]
    z_lo = zs[max(idx[0] - 1, 0)]

    def f(z: float) -> float:
        return float(np.exp(-beta * (_wall(np.array([z]), model)[0] - v_min)))

    points = [z_min] if z_lo < z_min < 0.5 * h else None
    half, _ = integrate.quad(f, z_lo, 0.5 * h, points=points, limit=400, epsabs=0.0, epsrel=1e-11)
    integral = 2.0 * half * np.exp(-beta * v_min)
    w = model.internal_width_nm
    kh = (integral / w) / (BOLTZMANN_J_PER_K * temperature_k * NM3_PER_M3) if w > 0 else 0.0
    return PoreLimit(
        width_nm=h,
        temperature_K=temperature_k,
        boltzmann_integral_nm=integral,
        henry_per_nm3_per_pa=kh,
        minimum_potential_k=v_min,
        accessible=v_min < 0.0,
    )


def zero_loading_heat_k(model: PoreModel, temperature_k: float, rel_step: float = 1e-3) -> float:
    """The exact isosteric heat at zero loading, in K (multiply by R for J/mol), from the
    temperature derivative of the Henry constant.

    In the Henry regime n = K_H(T) f with an ideal bulk gas (f = p), so at constant loading
    ln p = ln n - ln K_H and the isosteric heat q_st = -R (d ln p / d(1/T))_n is
        q_st^0 = R d ln K_H / d(1/T).
    With K_H = beta int exp(-beta V) dz / w this is R T - N_A <V>, <V> the Boltzmann-weighted
    mean wall energy: the zero-loading limit of the fluctuation formula kT - cov(U, N)/var(N)
    (Nicholson & Parsonage 1982). The derivative is taken by central differences in 1/T on
    the quadrature of :func:`pore_limit` (step ``rel_step`` relative: truncation ~1e-6 and
    quadrature noise ~1e-8 relative).

    Parameters
    ----------
    model : PoreModel
        The slit pore (probe, solid, width).
    temperature_k : float
        Temperature (K).
    rel_step : float
        Relative step in 1/T.

    Returns
    -------
    float
        q_st^0 / R in K; NaN for a pore that no molecule enters.
    """
    x = 1.0 / temperature_k
    h = rel_step * x
    lo = pore_limit(model, 1.0 / (x - h))
    hi = pore_limit(model, 1.0 / (x + h))
    if not (lo.henry_per_nm3_per_pa > 0 and hi.henry_per_nm3_per_pa > 0):
        return float("nan")
    return float((np.log(hi.henry_per_nm3_per_pa) - np.log(lo.henry_per_nm3_per_pa)) / (2.0 * h))
