"""The in-memory kernel: what a build hands to the library writer (gcmc.kernel.writer) and what
the reader (gcmc.reader) gives back. numpy only.

Shapes: T = temperatures, W = widths, P = pressures per temperature, D = dense pressures.
Arrays of simulated quantities have shape (T, W, P) per branch ("adsorption" always,
"desorption" when the build ran the descending ladder too; NaN where not run).

A future sampler that yields a whole isotherm per width (flat-histogram / transition-matrix
Monte Carlo) fills the same arrays from its continuous isotherm, sets ``sampler`` to its name,
and may add its own per-task datasets under ``extra``; the reader does not depend on how the
points were produced.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from gcmc.kernel.eqbranch import EquilibriumBranch
from gcmc.kernel.heat import HeatKernel
from gcmc.kernel.schema import POINT_FIELDS as _POINT_FIELDS

#: Quantities stored per simulated point, with their units (from the schema table).
POINT_FIELDS: dict[str, str] = dict(_POINT_FIELDS)


@dataclass(frozen=True)
class FitRecord:
    """A fitted correlating form for one isotherm (one temperature and width): the fields a
    kernel file stores. :class:`gcmc.pipeline.fits.FitResult` extends it with what the fit
    knows beyond the file (candidates tried, the simulated range, parameters at a bound).

    Attributes
    ----------
    form : str
        A name of :data:`gcmc.kernel.forms.FORMS`, ``"monotone_interpolant"`` or ``"zero"``.
    parameters, covariance : numpy.ndarray
        Parameters in the form's units and their covariance.
    chi2, reduced_chi2, p_value, aicc : float
        Goodness of fit.
    dof : int
        Degrees of freedom.
    residuals : numpy.ndarray
        (simulated - fitted) / stderr at each pressure (or at each simulated point).
    accepted : bool
        Passed the goodness-of-fit test.
    """

    form: str
    parameters: np.ndarray
    covariance: np.ndarray
    chi2: float
    dof: int
    reduced_chi2: float
    p_value: float
    aicc: float
    residuals: np.ndarray
    accepted: bool

    @property
    def stderr(self) -> np.ndarray:
        """Standard errors of the parameters: sqrt of the covariance diagonal."""
        with np.errstate(invalid="ignore"):
            return np.sqrt(np.diag(self.covariance))

    def record(self) -> FitRecord:
        """The stored part alone, as a plain FitRecord (float arrays)."""
        return FitRecord(
            form=self.form,
            parameters=np.asarray(self.parameters, float),
            covariance=np.asarray(self.covariance, float),
            chi2=self.chi2,
            dof=self.dof,
            reduced_chi2=self.reduced_chi2,
            p_value=self.p_value,
            aicc=self.aicc,
            residuals=np.asarray(self.residuals, float),
            accepted=self.accepted,
        )


@dataclass
class KernelData:
    """A kernel in memory: what the writer stores and the reader returns (shapes in the module
    docstring; the file layout in :mod:`gcmc.kernel.schema`)."""

    name: str
    version: int
    # model and conventions
    probe: dict[str, Any]
    solid: dict[str, Any]
    cutoff_nm: float
    box_nm: float
    tail_correction: str
    eos: str
    eos_parameters: dict[str, Any]
    width_convention: str  # "internal: w = H - sigma_ss"
    pore_volume_convention: str  # "A * w"
    sampler: str  # "gcmc-ladder" (point-wise GCMC) for now
    # axes
    temperatures_K: np.ndarray  # (T,)
    widths_H_nm: np.ndarray  # (W,)
    widths_w_nm: np.ndarray  # (W,)
    pressures_Pa: np.ndarray  # (T, P)
    relative_pressures: np.ndarray  # (T, P) p/p0, NaN when the grid is absolute
    saturation_pressures_Pa: np.ndarray  # (T,) p0 from the EOS, NaN above Tc
    fugacities_Pa: np.ndarray  # (T, P)
    bulk_density_per_nm3: np.ndarray  # (T, P)
    # simulated points: branch -> field -> (T, W, P)
    points: dict[str, dict[str, np.ndarray]]
    flags: dict[str, np.ndarray]  # branch -> (T, W, P) strings ("" when clean)
    # exact limits
    henry_per_nm3_per_pa: np.ndarray  # (T, W)
    accessible: np.ndarray  # (T, W) bool
    # fits, adsorption branch: fits[t][w]
    fits: list[list[FitRecord]]
    above_range: str  # "clamp" or "refuse"
    # dense table evaluated from the fits
    dense_pressures_Pa: np.ndarray  # (T, D)
    dense_density_per_nm3: np.ndarray  # (T, W, D)
    # provenance
    config_text: str
    provenance: dict[str, Any]  # code/library versions, host, created, seeds...
    task_seeds: np.ndarray  # (T, W) uint64 entropy words per task
    task_seconds: np.ndarray  # (T, W)
    extra: dict[str, np.ndarray] = field(default_factory=dict)
    # the isosteric-heat kernel (gcmc.kernel.heat), None when the kernel has none
    heat: HeatKernel | None = None
    # the equilibrium branch and transitions (gcmc.kernel.eqbranch), None when not computed
    equilibrium: EquilibriumBranch | None = None
