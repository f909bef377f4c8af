"""The equilibrium branch of a kernel: per (temperature, width), the equilibrium transition of a
pore with a hysteresis loop (gcmc.kernel.equilibrium), the equilibrium density branch on the
kernel's pressure grid, and the liquid-branch anchor with the reversible path it was
integrated along (gcmc.pipeline.anchor). numpy and h5py only (the reader's dependencies).

File layout (optional group ``equilibrium``, schema 1.1; rows in gcmc.kernel.schema). Arrays
per temperature T and width W; the path's states S (NaN-padded; the same count for every
pore of a kernel).

Where a pore has no loop, the equilibrium branch is its adsorption branch (``has_loop``
False, ``reason`` says so); where it has a loop but no transition could be located,
``has_transition`` is False, the branch is NaN and ``reason`` says why.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from gcmc.errors import InputError
from gcmc.kernel.schema import EQUILIBRIUM_DATASETS as DATASETS

EQ_GROUP = "equilibrium"
#: datasets added to the group after its first files: read as NaN where absent
_LATER = frozenset(
    {"path_n_variance_per_nm3", "path_nu_covariance_K_per_nm3", "path_u_variance_K2_per_nm3"}
)
EQ_METHOD = (
    "thermodynamic integration of beta Omega/V along both branches (gas: from the Henry "
    "limit; liquid: from an anchor at the top grid point, integrated along a reversible path "
    "d(beta Omega/V) = u d beta - n d ln z through a supercritical temperature); transition "
    "where they are equal (Peterson & Gubbins, Mol. Phys. 62 (1987) 215)"
)
EQ_ACTIVITY = "z = f/(k T) in nm^-3 (the GCMC activity, the same normalisation at every T)"


@dataclass
class EquilibriumBranch:
    """The stored equilibrium data of a kernel (shapes: module docstring)."""

    has_loop: np.ndarray
    has_transition: np.ndarray
    reason: np.ndarray
    fugacity_Pa: np.ndarray
    pressure_Pa: np.ndarray
    ln_f_stderr: np.ndarray
    ln_f_integration_error: np.ndarray
    pressure_uncertainty_Pa: np.ndarray
    extrapolated: np.ndarray
    loop_pressure_range_Pa: np.ndarray
    density_per_nm3: np.ndarray
    density_per_nm3_stderr: np.ndarray
    anchor_beta_omega_per_nm3: np.ndarray
    anchor_stderr: np.ndarray
    anchor_integration_error: np.ndarray
    path_temperature_K: np.ndarray
    path_ln_z: np.ndarray
    path_density_per_nm3: np.ndarray
    path_density_per_nm3_stderr: np.ndarray
    path_energy_K_per_nm3: np.ndarray
    path_energy_K_per_nm3_stderr: np.ndarray
    path_converged: np.ndarray
    path_n_variance_per_nm3: np.ndarray
    path_nu_covariance_K_per_nm3: np.ndarray
    path_u_variance_K2_per_nm3: np.ndarray
    hot_temperature_K: float = float("nan")

    @classmethod
    def empty(cls, n_t: int, n_w: int, n_p: int, n_s: int, hot: float) -> EquilibriumBranch:
        """All NaN / False / '' arrays of the right shapes."""
        out: dict[str, Any] = {}
        sizes = {"T": n_t, "W": n_w, "P": n_p, "S": n_s, "2": 2}
        for name, dtype, dims, _, _ in DATASETS:
            shape = tuple(sizes[c] for c in dims)
            if dtype == "bool":
                out[name] = np.zeros(shape, dtype=bool)
            elif dtype == "str":
                out[name] = np.full(shape, "", dtype=object)
            else:
                out[name] = np.full(shape, np.nan)
        return cls(hot_temperature_K=float(hot), **out)

    def transition(self, t: int, j: int) -> tuple[float, float]:
        """(p_eq, its uncertainty) in Pa of pore j at temperature index t (NaN: none)."""
        return float(self.pressure_Pa[t, j]), float(self.pressure_uncertainty_Pa[t, j])


def validate_equilibrium(eq: Any, n_t: int, n_w: int, n_p: int) -> None:
    """Shapes of an EquilibriumBranch for a kernel of (n_t, n_w, n_p); InputError naming the
    first offending field."""
    if not isinstance(eq, EquilibriumBranch):
        raise InputError(
            f"equilibrium: must be an EquilibriumBranch or None, got {type(eq).__name__}"
        )
    n_s = np.shape(eq.path_ln_z)[-1] if np.ndim(eq.path_ln_z) == 3 else -1
    sizes = {"T": n_t, "W": n_w, "P": n_p, "S": n_s, "2": 2}
    for name, _, dims, _, _ in DATASETS:
        shape = tuple(sizes[c] for c in dims)
        a = np.asarray(getattr(eq, name))
        if a.shape != shape:
            raise InputError(f"equilibrium.{name}: shape {a.shape}, expected {shape}")


def write_equilibrium(parent: Any, eq: EquilibriumBranch) -> None:
    """Write ``eq`` as the group ``equilibrium`` under an open h5py File or Group."""
    import h5py

    g = parent.create_group(EQ_GROUP)
    g.attrs["method"] = EQ_METHOD
    g.attrs["activity"] = EQ_ACTIVITY
    g.attrs["hot_temperature_K"] = float(eq.hot_temperature_K)
    for name, dtype, _, units, meaning in DATASETS:
        value = np.asarray(getattr(eq, name))
        if dtype == "str":
            flat = [str(x) for x in value.ravel()]
            ds = g.create_dataset(
                name,
                data=np.array(flat, dtype=object).reshape(value.shape),
                dtype=h5py.string_dtype(),
            )
        elif dtype == "bool":
            ds = g.create_dataset(name, data=value.astype(bool))
        else:
            ds = g.create_dataset(name, data=value.astype(float))
        ds.attrs["units"] = units
        ds.attrs["description"] = meaning


def _text(x: Any) -> str:
    """A string of an HDF5 string dataset (str objects from asstr, or bytes)."""
    return x.decode("utf-8") if isinstance(x, bytes) else str(x)


def read_equilibrium(f: Any, values: dict[str, Any] | None = None) -> EquilibriumBranch | None:
    """The EquilibriumBranch of an open kernel file, None when the file has none (files
    before schema 1.1, or built without [equilibrium])."""
    if EQ_GROUP not in f:
        return None
    g = f[EQ_GROUP]
    out: dict[str, Any] = {}
    for name, dtype, _, _, _ in DATASETS:
        key = f"{EQ_GROUP}/{name}"
        if values is not None and key in values:
            v = np.array(values[key])
        elif name not in g and name in _LATER:
            v = np.full(np.shape(g["path_ln_z"]), np.nan)  # written before the field was
        elif dtype == "str":
            v = np.array(g[name].asstr()[()])
        else:
            v = np.array(g[name][()])
        if dtype == "str":
            v = np.array([_text(x) for x in v.ravel()], dtype=str).reshape(v.shape)
        elif dtype == "bool":
            v = v.astype(bool)
        else:
            v = v.astype(float)
        out[name] = v
    hot = g.attrs.get("hot_temperature_K", np.nan)
    return EquilibriumBranch(hot_temperature_K=float(hot), **out)


__all__ = [
    "EQ_GROUP",
    "EquilibriumBranch",
    "read_equilibrium",
    "validate_equilibrium",
    "write_equilibrium",
]
