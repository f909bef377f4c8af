"""The isosteric-heat kernel: per temperature and width, the isosteric heat q_st as a function of
the loading, fitted to the per-point heats the engine measures (the fluctuation formula,
Nicholson & Parsonage 1982), stored beside the density kernel. numpy and h5py only, so that a
downstream code can fit heats and amounts together with the reader alone.

Form (``loading_polynomial``): q_st(n) = sum_{i=0}^{m} a_i n^i, n the absolute density of the
pore (molecules per nm^3 of pore volume), m = 0..3. A polynomial in the loading is the heat of
the virial isotherm (q_st = -R sum a_i n^i; L. Czepirski & J. Jagiello, Chem. Eng. Sci. 44
(1989) 797); a_0 is the zero-loading (Henry-limit) heat. At a pressure p the heat kernel is
q_st(n(p)), with n(p) the density kernel at the same width (so that heats and amounts of a
downstream fit are consistent); between kernel widths q_st and its error are interpolated
linearly in width, as the density is.

Errors: the coefficients' covariance C (from the weighted fit, see
:func:`gcmc.pipeline.heat.fit_heat`); the standard error at a loading n is sqrt(v C v^T),
v = (1, n, n^2, ...). Loadings outside the fitted range [n_lo, n_hi] are clamped to it (no
extrapolation of the polynomial) except towards n = 0, where the polynomial is the zero-
loading limit it was fitted to approach.

File layout (group ``isosteric_heat``; arrays per temperature T and width W; units in
attributes): ``coefficients`` (T, W, 4) kJ/mol per (nm^-3)^i, NaN beyond the degree;
``covariance`` (T, W, 4, 4); ``degree`` (T, W) int, -1 where no heat was fitted (inaccessible
pores, or fewer than one point with an error); ``chi2``, ``dof`` (T, W); ``loading_range_per_nm3``
(T, W, 2). Attributes: ``form``, ``equation``, ``reference``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from gcmc.errors import InputError

HEAT_GROUP = "isosteric_heat"
HEAT_FORM = "loading_polynomial"
MAX_TERMS = 4  # degree 0..3
HEAT_EQUATION = "q_st(n) = sum_i a_i n^i, n the absolute density (nm^-3), i = 0..degree"
HEAT_REFERENCE = (
    "per-point heats from the fluctuation formula (Nicholson & Parsonage 1982); polynomial in "
    "the loading as for the virial isotherm (Czepirski & Jagiello, Chem. Eng. Sci. 44 (1989) 797)"
)


@dataclass
class HeatKernel:
    """Fitted isosteric heats, per temperature and width (module docstring)."""

    coefficients: np.ndarray  # (T, W, 4) kJ/mol per (nm^-3)^i; NaN beyond the degree
    covariance: np.ndarray  # (T, W, 4, 4)
    degree: np.ndarray  # (T, W) int, -1: no heat
    chi2: np.ndarray  # (T, W)
    dof: np.ndarray  # (T, W) int
    loading_range_per_nm3: np.ndarray  # (T, W, 2)

    def zero_loading(self, t: int) -> tuple[np.ndarray, np.ndarray]:
        """The zero-loading heat a_0 and its standard error per width at temperature index t
        (kJ/mol; NaN where no heat was fitted)."""
        a0 = np.where(self.degree[t] >= 0, self.coefficients[t, :, 0], np.nan)
        se = np.where(self.degree[t] >= 0, np.sqrt(np.abs(self.covariance[t, :, 0, 0])), np.nan)
        return a0, se


def evaluate_heat(
    coefficients: np.ndarray, covariance: np.ndarray, degree: int, loading: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """q_st and its standard error (kJ/mol) at loadings n (nm^-3) for one fitted width.

    Parameters
    ----------
    coefficients : numpy.ndarray
        (4,) a_i, NaN beyond the degree.
    covariance : numpy.ndarray
        (4, 4) covariance of the a_i.
    degree : int
        Polynomial degree; -1 gives NaN.
    loading : numpy.ndarray
        Loadings n (nm^-3), already clamped to the fitted range where wanted.

    Returns
    -------
    tuple of numpy.ndarray
        (q_st, standard error), each shaped like ``loading``.
    """
    n = np.asarray(loading, dtype=float)
    if degree < 0:
        return np.full(n.shape, np.nan), np.full(n.shape, np.nan)
    k = degree + 1
    v = n[..., None] ** np.arange(k)
    a = np.asarray(coefficients, float)[:k]
    c = np.asarray(covariance, float)[:k, :k]
    q = v @ a
    var = np.einsum("...i,ij,...j->...", v, c, v)
    return q, np.sqrt(np.maximum(var, 0.0))


def heat_matrix(
    kernel: Any,
    pressures_Pa: np.ndarray,
    widths_nm: np.ndarray,
    temperature_K: float,
    width_axis: str = "w",
) -> tuple[np.ndarray, np.ndarray]:
    """The heat kernel matrix q_st(p_i, w_j) and its standard errors (kJ/mol), shape
    (pressures, widths), for a gcmc.reader.Kernel (module docstring: q_st(n(p)) at each kernel
    width, linear in width between them; NaN where a bracketing width has no heat).

    Raises
    ------
    InputError
        The kernel has no heat kernel, or the widths are outside its range.
    """
    data = kernel.data
    heat = data.heat
    if heat is None:
        label = getattr(kernel, "_label", f"kernel {data.name!r}")
        raise InputError(f"{label}: no isosteric-heat kernel in this file")
    t = kernel.temperature_index(float(temperature_K))
    p = np.asarray(pressures_Pa, dtype=float)
    x = np.asarray(widths_nm, dtype=float)
    axis = np.asarray(data.widths_w_nm if width_axis == "w" else data.widths_H_nm, float)
    if width_axis not in ("w", "H"):
        raise InputError(f"width_axis: must be 'w' or 'H', got {width_axis!r}")
    span = float(axis[-1] - axis[0]) if axis.size > 1 else 1.0
    if np.any((x < axis[0] - 1e-9 * span) | (x > axis[-1] + 1e-9 * span)):
        raise InputError(
            f"widths_nm: outside the kernel's {width_axis} range [{axis[0]:g}, {axis[-1]:g}] nm"
        )
    if axis.size == 1:
        lo = hi = np.zeros(x.size, int)
        frac = np.zeros(x.size)
    else:
        xc = np.clip(x, axis[0], axis[-1])
        lo = np.clip(np.searchsorted(axis, xc, side="right") - 1, 0, axis.size - 2)
        hi = lo + 1
        frac = (xc - axis[lo]) / (axis[hi] - axis[lo])
    need = np.unique(np.concatenate([lo, hi]))
    n = kernel.evaluate(p, axis[need], float(data.temperatures_K[t]), width_axis=width_axis)
    q_cols, e_cols = {}, {}
    for c, j in enumerate(need):
        deg = int(heat.degree[t, j])
        n_hi = float(heat.loading_range_per_nm3[t, j, 1])
        nn = np.clip(n[:, c], 0.0, n_hi) if np.isfinite(n_hi) else n[:, c]
        q_cols[j], e_cols[j] = evaluate_heat(
            heat.coefficients[t, j], heat.covariance[t, j], deg, nn
        )
    q = np.stack(
        [q_cols[a] * (1 - f) + q_cols[b] * f for a, b, f in zip(lo, hi, frac, strict=True)], axis=1
    )
    e = np.stack(
        [e_cols[a] * (1 - f) + e_cols[b] * f for a, b, f in zip(lo, hi, frac, strict=True)], axis=1
    )
    return q, e


def validate_heat(heat: Any, n_t: int, n_w: int) -> None:
    """Shapes and values of a HeatKernel for a kernel of n_t temperatures and n_w widths;
    InputError naming the first offending field."""
    if not isinstance(heat, HeatKernel):
        raise InputError(f"heat: must be a HeatKernel or None, got {type(heat).__name__}")
    shapes = {
        "coefficients": (n_t, n_w, MAX_TERMS),
        "covariance": (n_t, n_w, MAX_TERMS, MAX_TERMS),
        "degree": (n_t, n_w),
        "chi2": (n_t, n_w),
        "dof": (n_t, n_w),
        "loading_range_per_nm3": (n_t, n_w, 2),
    }
    for name, shape in shapes.items():
        a = np.asarray(getattr(heat, name))
        if a.shape != shape:
            raise InputError(f"heat.{name}: shape {a.shape}, expected {shape}")
    deg = np.asarray(heat.degree)
    if np.any((deg < -1) | (deg >= MAX_TERMS)):
        raise InputError(f"heat.degree: must be -1..{MAX_TERMS - 1}")
    coef = np.asarray(heat.coefficients, float)
    for t in range(n_t):
        for j in range(n_w):
            d = int(deg[t, j])
            if d >= 0 and not np.all(np.isfinite(coef[t, j, : d + 1])):
                raise InputError(f"heat.coefficients[{t}, {j}]: not finite up to degree {d}")


def write_heat(group_parent: Any, heat: HeatKernel) -> None:
    """Write ``heat`` as the group ``isosteric_heat`` under an open h5py File or Group."""
    g = group_parent.create_group(HEAT_GROUP)
    g.attrs["form"] = HEAT_FORM
    g.attrs["equation"] = HEAT_EQUATION
    g.attrs["reference"] = HEAT_REFERENCE
    items = (
        ("coefficients", np.asarray(heat.coefficients, float), "kJ/mol per (nm^-3)^i"),
        ("covariance", np.asarray(heat.covariance, float), "(kJ/mol)^2 per (nm^-3)^(i+j)"),
        ("degree", np.asarray(heat.degree, np.int64), "1"),
        ("chi2", np.asarray(heat.chi2, float), "1"),
        ("dof", np.asarray(heat.dof, np.int64), "1"),
        ("loading_range_per_nm3", np.asarray(heat.loading_range_per_nm3, float), "nm^-3"),
    )
    for name, value, units in items:
        ds = g.create_dataset(name, data=value)
        ds.attrs["units"] = units


def read_heat(f: Any, values: dict[str, Any] | None = None) -> HeatKernel | None:
    """The HeatKernel of an open kernel file, None when the file has none."""
    if HEAT_GROUP not in f:
        return None

    def get(name: str) -> np.ndarray:
        key = f"{HEAT_GROUP}/{name}"
        if values is not None and key in values:
            return np.array(values[key])
        return np.array(f[key][()])

    return HeatKernel(
        coefficients=get("coefficients").astype(float),
        covariance=get("covariance").astype(float),
        degree=get("degree").astype(int),
        chi2=get("chi2").astype(float),
        dof=get("dof").astype(int),
        loading_range_per_nm3=get("loading_range_per_nm3").astype(float),
    )


__all__ = [
    "HEAT_FORM",
    "HEAT_GROUP",
    "MAX_TERMS",
    "HeatKernel",
    "evaluate_heat",
    "heat_matrix",
    "read_heat",
    "validate_heat",
    "write_heat",
]
