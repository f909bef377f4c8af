"""Interaction potentials, in nm and kelvin (energies are E/k).

Pure functions; the compiled ones are used by the engine's inner loops, the vectorised ones
by quadratures (Henry constants, accessibility) and by tests.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from gcmc.physics.model import SLIT, PoreModel, Probe, default_solid

#: A trial move whose Boltzmann exponent from one pair (or the wall) exceeds this is rejected
#: without finishing the energy sum. The acceptance it discards is below exp(-OVERLAP_BETA_U
#: + beta*|U_attractive|), i.e. below 1e-60 for any fluid state: exact in practice.
OVERLAP_BETA_U = 200.0


# --- Lennard-Jones 12-6 -----------------------------------------------------------------


def lj(r_nm: np.ndarray | float, epsilon_k: float, sigma_nm: float) -> np.ndarray | float:
    """Full LJ 12-6 pair energy (K)."""
    s6 = (sigma_nm / np.asarray(r_nm)) ** 6
    return 4.0 * epsilon_k * (s6 * s6 - s6)


def overlap_distance_nm(epsilon_k: float, sigma_nm: float, temperature_k: float) -> float:
    """Pair distance below which beta*u_LJ > OVERLAP_BETA_U (repulsive branch)."""
    # Solve 4 beta eps (x^2 - x) = B with x = (sigma/r)^6, x > 1.
    b = OVERLAP_BETA_U * temperature_k / (4.0 * epsilon_k)
    x = 0.5 * (1.0 + math.sqrt(1.0 + 4.0 * b))
    return sigma_nm * x ** (-1.0 / 6.0)


def homogeneous_tail_constant(epsilon_k: float, sigma_nm: float, cutoff_nm: float) -> float:
    """c in U_tail = N^2 c / V for a uniform fluid beyond the cutoff (Allen & Tildesley)."""
    sr3 = (sigma_nm / cutoff_nm) ** 3
    return (8.0 / 3.0) * math.pi * epsilon_k * sigma_nm**3 * (sr3**3 / 3.0 - sr3)


def homogeneous_tail_pressure_k_nm3(
    rho_nm3: float, epsilon_k: float, sigma_nm: float, cutoff_nm: float
) -> float:
    """Tail pressure p_tail/k in K/nm^3 (Allen & Tildesley)."""
    sr3 = (sigma_nm / cutoff_nm) ** 3
    return (
        (16.0 / 3.0) * math.pi * rho_nm3**2 * epsilon_k * sigma_nm**3 * (2.0 / 3.0 * sr3**3 - sr3)
    )


def slab_tail_pair(
    dz_nm: np.ndarray | float, epsilon_k: float, sigma_nm: float, cutoff_nm: float
) -> np.ndarray | float:
    """Tail energy x area (K nm^2) between a molecule and a laterally uniform smear of one molecule
    per unit area at height difference dz, counting only pair distances beyond the cutoff.

    phi(dz) = 2 pi int_a^inf r u(r) dr with a = max(|dz|, r_c)
            = 8 pi eps [sigma^12/(10 a^10) - sigma^6/(4 a^4)].
    The slab tail correction of Janecek, J. Phys. Chem. B 110 (2006) 6264, applied with the
    instantaneous density profile.
    """
    a = np.maximum(np.abs(dz_nm), cutoff_nm)
    return 8.0 * math.pi * epsilon_k * (sigma_nm**12 / (10.0 * a**10) - sigma_nm**6 / (4.0 * a**4))


# --- Steele 10-4-3 wall ------------------------------------------------------------------


@njit(cache=True, error_model="numpy")
def steele_wall(z, prefactor_k, sigma_sf_nm, delta_nm):
    """One graphite wall, z from the plane of carbon nuclei (Steele, Surf. Sci. 36 (1973) 317).

    prefactor_k = 2 pi rho_s eps_sf sigma_sf^2 Delta.
    """
    sz2 = (sigma_sf_nm / z) ** 2
    sz4 = sz2 * sz2
    sz10 = sz4 * sz4 * sz2
    t = z + 0.61 * delta_nm
    return prefactor_k * (0.4 * sz10 - sz4 - sigma_sf_nm**4 / (3.0 * delta_nm * t * t * t))


@njit(cache=True, error_model="numpy")
def slit_wall_energy(z, width_nm, prefactor_k, sigma_sf_nm, delta_nm):
    """Both walls of a slit pore: V(z) + V(H - z)."""
    return steele_wall(z, prefactor_k, sigma_sf_nm, delta_nm) + steele_wall(
        width_nm - z, prefactor_k, sigma_sf_nm, delta_nm
    )


def steele_prefactor_k(model: PoreModel) -> float:
    """Prefactor of the Steele 10-4-3 potential, 2 pi rho_s eps_sf sigma_sf^2 Delta, in K."""
    sf = model.solid_fluid
    s = model.solid
    return 2.0 * math.pi * s.density_nm3 * sf.epsilon_k * sf.sigma_nm**2 * s.interlayer_nm


def wall_potential_k(model: PoreModel, z_nm: np.ndarray) -> np.ndarray:
    """Slit-pore potential V(z) + V(H - z) in K, vectorised (for quadratures and plots)."""
    z = np.asarray(z_nm, dtype=float)
    out = np.empty_like(z)
    pre = steele_prefactor_k(model)
    sf = model.solid_fluid
    for i, zi in np.ndenumerate(z):
        out[i] = slit_wall_energy(zi, model.width_nm, pre, sf.sigma_nm, model.solid.interlayer_nm)
    return out


# --- Cutoff policy --------------------------------------------------------------------------

#: Default fluid-fluid cutoff in units of the probe's sigma. In slit pores the neglected tail
#: beyond r_c is added by the slab correction (see slab_tail_pair), so 3 sigma reproduces the
#: loading of a longer cutoff within the statistical error (tests/test_engine_physics.py);
#: bulk runs add the homogeneous long-range correction.
DEFAULT_CUTOFF_SIGMA = 3.0


def default_cutoff_nm(probe: Probe) -> float:
    """The fluid-fluid cutoff radius for a probe (nm): 3 sigma."""
    return DEFAULT_CUTOFF_SIGMA * probe.sigma_nm


def slit_pore(probe: Probe, width_nm: float, box_nm: float) -> PoreModel:
    """A slit pore of the default solid with the probe's default cutoff.

    Parameters
    ----------
    probe : Probe
        The adsorbing fluid.
    width_nm : float
        Wall-to-wall width H (nm).
    box_nm : float
        The periodic edge (nm).

    Returns
    -------
    PoreModel
        The pore; the other fields at their defaults.
    """
    return PoreModel(
        probe=probe,
        solid=default_solid(),
        geometry=SLIT,
        cutoff_nm=default_cutoff_nm(probe),
        box_nm=box_nm,
        width_nm=width_nm,
    )


#: The default periodic edge is at least this many probe diameters, so that one adsorbed layer
#: holds about a hundred molecules (smaller boxes distort layering transitions).
MIN_BOX_SIGMA = 10.0


def default_box_nm(cutoff_nm: float, sigma_nm: float) -> float:
    """The periodic edge by default: max(2 r_c, 10 sigma), rounded up to 0.01 nm."""
    edge = max(2.0 * cutoff_nm, MIN_BOX_SIGMA * sigma_nm)
    return math.ceil(edge * 100.0 - 1e-9) / 100.0


# --- Lateral box that a close-packed layer fits -----------------------------------------------

#: lateral box kinds: "square" (max(2 r_c, 10 sigma) square) or "hexagonal" (a rectangle
#: holding whole rows of a close-packed layer at CLOSE_PACKED_SPACING_SIGMA)
LATERAL_BOXES = ("square", "hexagonal")


def triangular_lattice_spacing_sigma(shells: int = 200) -> float:
    """Nearest-neighbour distance / sigma of a close-packed (triangular) LJ 12-6 monolayer at
    zero temperature and zero spreading pressure, untruncated potential.

    The energy per molecule of a triangular lattice of spacing a is
    2 eps [S12 (sigma/a)^12 - S6 (sigma/a)^6] with the lattice sums S_n = sum over lattice
    vectors r != 0 of |r/a|^-n; its minimum is at a / sigma = (2 S12 / S6)^(1/6) (exact for
    this model; the sums converge like R^-4 and R^-10, so 200 shells give 1e-9). Result
    1.1115 (2^(1/6) = 1.1225 would be the isolated pair's minimum).
    """
    i = np.arange(-shells, shells + 1, dtype=float)
    ii, jj = np.meshgrid(i, i, indexing="ij")
    r2 = ii * ii + ii * jj + jj * jj  # |i a1 + j a2|^2 / a^2 with a1, a2 at 60 degrees
    r2 = r2[(r2 > 0) & (r2 <= shells * shells)]
    s6 = float(np.sum(r2**-3))
    s12 = float(np.sum(r2**-6))
    return (2.0 * s12 / s6) ** (1.0 / 6.0)


#: The row spacing used for hexagonal lateral boxes, in probe diameters: the zero-temperature,
#: zero-pressure close-packed monolayer of the full LJ potential (see
#: triangular_lattice_spacing_sigma). Why this value: the Steele wall is smooth (no lateral
#: corrugation), so a dense layer in a slit chooses its own in-plane spacing, the LJ lattice's
#: (the slab tail adds the interactions beyond r_c, so the full potential is the right one);
#: at finite temperature and spreading pressure it differs by about a per cent, which a box
#: holding whole rows absorbs as a small uniform strain instead of forcing a defect line; the
#: box-size check of a certificate (gcmc.sampling.certificate) measures what is left.
CLOSE_PACKED_SPACING_SIGMA = round(triangular_lattice_spacing_sigma(), 4)


def lateral_box_nm(
    kind: str, cutoff_nm: float, sigma_nm: float, scale: float = 1.0
) -> tuple[float, float, tuple[int, int]]:
    """(L_x, L_y, (rows along y, molecules per row)) of a slit's periodic lateral box.

    ``"square"``: the default edge max(2 r_c, 10 sigma) x ``scale`` on both sides (rows (0, 0)).
    ``"hexagonal"``: the smallest rectangle with both edges >= that edge whose x edge holds a
    whole number n_x of spacings a = CLOSE_PACKED_SPACING_SIGMA sigma and whose y edge an even
    number n_y of row distances a sqrt(3)/2 (a triangular layer is periodic over two rows), so
    that a defect-free close-packed layer of n_x n_y molecules fits.
    """
    from gcmc.errors import InputError

    if kind not in LATERAL_BOXES:
        raise InputError(f"lateral_box: {kind!r} is not one of {', '.join(LATERAL_BOXES)}")
    if not scale >= 1.0:
        raise InputError(f"lateral box scale: must be >= 1, got {scale!r}")
    edge = max(2.0 * cutoff_nm, MIN_BOX_SIGMA * sigma_nm) * scale
    if kind == "square":
        e = math.ceil(edge * 100.0 - 1e-9) / 100.0
        return e, e, (0, 0)
    a = CLOSE_PACKED_SPACING_SIGMA * sigma_nm
    row = a * math.sqrt(3.0) / 2.0
    nx = math.ceil(edge / a - 1e-9)
    ny = math.ceil(edge / row - 1e-9)
    ny += ny % 2
    return nx * a, ny * row, (ny, nx)


def with_lateral_box(model: PoreModel, kind: str, scale: float = 1.0) -> PoreModel:
    """The slit ``model`` with its lateral box chosen by :func:`lateral_box_nm`."""
    from dataclasses import replace

    lx, ly, _ = lateral_box_nm(kind, model.cutoff_nm, model.probe.sigma_nm, scale)
    return replace(model, box_nm=lx, box_y_nm=ly if kind != "square" else 0.0, lateral_box=kind)
