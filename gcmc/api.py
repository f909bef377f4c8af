"""The Python API: the jobs of the command line as functions that print nothing and return
result objects with named fields.

================================  ===========================================================
:func:`run_point`                  one state point (pressure or fugacity) -> :class:`PointRun`
:func:`build_kernel`               a run config -> :class:`BuildResult` (the kernel file)
:func:`open_kernel`                a kernel file -> :class:`~gcmc.kernel.reader.Kernel`
:func:`check_kernel`               quality checks -> :class:`CheckResult`
:func:`diff_kernels`               two kernels of one probe -> :class:`DiffResult`
================================  ===========================================================

Every bad argument raises :class:`gcmc.errors.InputError` naming the parameter. Progress
bars are off unless asked for (``progress=True``).

Examples
--------
>>> import gcmc.api as g
>>> run = g.run_point("argon", 87.3, pressure_Pa=10.0, width_H_nm=1.2)  # doctest: +SKIP
>>> round(run.density_per_nm3, 2), run.converged  # doctest: +SKIP
(0.56, True)
"""

from __future__ import annotations

import math
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from gcmc.errors import InputError
from gcmc.kernel.reader import Kernel
from gcmc.kernel.reader import open_kernel as _open_kernel

if TYPE_CHECKING:
    from gcmc.physics.model import PoreModel, Probe
    from gcmc.pipeline.build import BuildResult
    from gcmc.quality.criteria import CheckReport, Criterion
    from gcmc.quality.diff import DiffReport
    from gcmc.sampling.point import PointResult, SamplingSettings, ThermoState

__all__ = [
    "CheckResult",
    "DiffResult",
    "PointRun",
    "build_kernel",
    "check_kernel",
    "diff_kernels",
    "open_kernel",
    "run_point",
]


def _jsonable(x: Any) -> Any:
    """Plain Python values for JSON (:func:`gcmc.quality.criteria.jsonable`, imported when
    first needed, as this module imports the quality layer)."""
    from gcmc.quality.criteria import jsonable

    return jsonable(x)


# --------------------------------------------------------------------------------------------
# one point
# --------------------------------------------------------------------------------------------
@dataclass
class PointRun:
    """One simulated state point.

    Attributes
    ----------
    result : PointResult
        Everything measured (densities per pore volume A w, energies, isosteric heat,
        replica means, acceptance, flags); NaN where unavailable.
    model : PoreModel
        The simulated system (probe, solid, geometry, cutoff, box).
    state : ThermoState
        The bulk reservoir (temperature, fugacity, and where the equation of state gave
        them, pressure, bulk density and residual enthalpy).
    eos : str
        The equation of state used to map the pressure or fugacity.
    settings : SamplingSettings
        The sampling settings of the run.
    seed : int
        The random seed (one seed, one result).
    notes : list of str
        What is unavailable and why (e.g. a fugacity the EOS cannot map to a pressure).
    compile_or_cache_load_seconds : float
        Time to compile or load the compiled engine in this process (0 once loaded).
    """

    result: PointResult
    model: PoreModel
    state: ThermoState
    eos: str
    settings: SamplingSettings
    seed: int
    notes: list[str] = field(default_factory=list)
    compile_or_cache_load_seconds: float = 0.0

    @property
    def converged(self) -> bool:
        """True when no flag marks the point unconverged."""
        return bool(self.result.converged)

    @property
    def flags(self) -> list[str]:
        """The point's flags (meanings: kernels/README.md)."""
        return list(self.result.flags)

    @property
    def density_per_nm3(self) -> float:
        """Absolute density, molecules per nm^3 of pore volume."""
        return float(self.result.density_per_nm3)

    @property
    def density_per_nm3_stderr(self) -> float:
        """Standard error of the density (block averaging, replicas pooled)."""
        return float(self.result.density_per_nm3_stderr)

    @property
    def excess_density_per_nm3(self) -> float:
        """Density minus the bulk density (NaN when the bulk state is unavailable)."""
        return float(self.result.excess_density_per_nm3)

    @property
    def pressure_Pa(self) -> float:
        """Bulk pressure (NaN when the EOS could not map the fugacity)."""
        return float(self.result.pressure_Pa)

    @property
    def fugacity_Pa(self) -> float:
        """Bulk fugacity."""
        return float(self.result.fugacity_Pa)

    def to_dict(self) -> dict[str, Any]:
        """The record as JSON-ready values (NaN -> None): the point's fields, ``model``,
        ``notes``, ``seed`` and ``compile_or_cache_load_seconds``."""
        out = self.result.to_dict()
        out["model"] = self.model.describe(slab_tail=self.settings.slab_tail)
        out["eos_requested"] = self.eos
        out["notes"] = list(self.notes)
        out["seed"] = self.seed
        out["compile_or_cache_load_seconds"] = self.compile_or_cache_load_seconds
        return _jsonable(out)


def run_point(
    probe: str | Probe | None,
    temperature_K: float,
    *,
    pressure_Pa: float | None = None,
    fugacity_Pa: float | None = None,
    width_H_nm: float | None = None,
    width_w_nm: float | None = None,
    bulk: bool = False,
    eos: str | None = None,
    moves: int = 1_000_000,
    replicas: int = 2,
    insertion_trials: int = 0,
    seed: int = 12345,
    epsilon_k: float | None = None,
    sigma_nm: float | None = None,
    probe_library: str | Path | None = None,
    box_nm: float | None = None,
    cutoff_nm: float | None = None,
    epsilon_sf_scale: float | None = None,
    progress: bool | Callable[[int], None] = False,
) -> PointRun:
    """Simulate one state point: a probe in a graphitic slit pore (or a periodic bulk cube) in
    equilibrium with a bulk gas at a pressure (through an equation of state) or a fugacity.

    Parameters
    ----------
    probe : str, Probe or None
        A probe of the library (e.g. ``"argon"``, ``"methane"``), a Probe, or None with
        ``epsilon_k`` and ``sigma_nm`` for an inline Lennard-Jones probe.
    temperature_K : float
        Temperature in K.
    pressure_Pa : float, optional
        Bulk pressure in Pa, converted to a fugacity by ``eos``.
    fugacity_Pa : float, optional
        Bulk fugacity in Pa; needs no EOS. Where the EOS cannot map it to a pressure, the
        point is still simulated and the pressure, bulk density, excess density and
        isosteric heat are NaN, with a note. Give exactly one of ``pressure_Pa`` and
        ``fugacity_Pa``.
    width_H_nm : float, optional
        Slit width H in nm between the planes of carbon nuclei.
    width_w_nm : float, optional
        Internal slit width w = H - sigma_ss in nm (the width of inversions and of
        ``gcmc check``). Give one of ``width_H_nm``, ``width_w_nm`` or ``bulk=True``.
    bulk : bool, optional
        A periodic cube of bulk fluid instead of a slit.
    eos : str, optional
        ``"reference"``, ``"peng-robinson"``, ``"lennard-jones"`` or ``"ideal"``; default
        ``"reference"`` where the probe has one, else ``"lennard-jones"``.
    moves : int, optional
        Trial moves per replica (the first fifth equilibrates); at least 10 000. Default
        1 000 000 (as ``gcmc point --moves``).
    replicas : int, optional
        Independent replicas (default 2: the second starts over-filled, and replicas that
        disagree flag the point unconverged; 1 skips that check).
    insertion_trials : int, optional
        Trial positions per insertion: 1 plain, k > 1 biased, 0 automatic (default).
    seed : int, optional
        Random seed. Default 12345.
    epsilon_k, sigma_nm : float, optional
        Inline probe: LJ epsilon/k in K and sigma in nm.
    probe_library : str or Path, optional
        A TOML probe library of your own instead of the package's.
    box_nm : float, optional
        Periodic edge in nm (default max(2 x cutoff, 10 sigma)).
    cutoff_nm : float, optional
        LJ cutoff in nm (default 3 sigma).
    epsilon_sf_scale : float, optional
        Scale of the Lorentz-Berthelot solid-fluid epsilon.
    progress : bool or callable, optional
        True: a progress bar on stderr; a callable: called with the moves done since its last
        call. Default False (silent).

    Returns
    -------
    PointRun
        The measured point (``result``), the model, the reservoir, the notes.

    Raises
    ------
    InputError
        A bad argument (named), or a pressure the equation of state refuses.

    Examples
    --------
    >>> from gcmc.api import run_point
    >>> run = run_point("methane", 298.15, pressure_Pa=2e6, width_H_nm=1.2,
    ...                 moves=60_000)  # doctest: +SKIP
    >>> round(run.density_per_nm3, 1), run.converged, run.flags[0][:15]  # doctest: +SKIP
    (8.4, False, 'error_unreliabl')
    >>> dense = run_point("argon", 239.6, fugacity_Pa=7e8, bulk=True,
    ...                   moves=20_000)  # doctest: +SKIP
    >>> dense.pressure_Pa, dense.notes[0][:22]  # doctest: +SKIP
    (nan, 'pressure, bulk density')
    """
    from gcmc.pipeline.state_point import (
        bulk_reservoir,
        point_model,
        point_settings,
        resolve_probe,
        simulate,
        total_moves,
    )
    from gcmc.sampling.box import warm_up

    p = resolve_probe(probe, epsilon_k=epsilon_k, sigma_nm=sigma_nm, probe_library=probe_library)
    model = point_model(
        p,
        width_H_nm=width_H_nm,
        width_w_nm=width_w_nm,
        bulk=bulk,
        box_nm=box_nm,
        cutoff_nm=cutoff_nm,
        epsilon_sf_scale=epsilon_sf_scale,
    )
    reservoir = bulk_reservoir(
        p, temperature_K, pressure_Pa=pressure_Pa, fugacity_Pa=fugacity_Pa, eos=eos
    )
    settings = point_settings(moves, replicas, insertion_trials)
    load_s = warm_up()
    if callable(progress):
        outcome = simulate(model, reservoir, settings, seed, progress=progress)
    elif progress:
        from tqdm import tqdm

        with tqdm(
            total=total_moves(settings),
            unit="move",
            unit_scale=True,
            desc="point",
            file=sys.stderr,
            leave=False,
        ) as bar:
            outcome = simulate(model, reservoir, settings, seed, progress=bar.update)
    else:
        outcome = simulate(model, reservoir, settings, seed)
    return PointRun(
        result=outcome.result,
        model=model,
        state=reservoir.state,
        eos=reservoir.eos,
        settings=settings,
        seed=seed,
        notes=list(reservoir.notes),
        compile_or_cache_load_seconds=load_s,
    )


# --------------------------------------------------------------------------------------------
# kernels
# --------------------------------------------------------------------------------------------
def build_kernel(
    config: str | Path,
    *,
    workers: int = 0,
    progress: bool = False,
    plan_only: bool = False,
) -> BuildResult:
    """Build the kernel of a run config (TOML), resuming from the tasks already on disk.

    Prints nothing. The kernel file is written into the config's output folder as
    ``<name>.v<N>.h5``; a config whose kernel exists returns at once (``status ==
    "up_to_date"``).

    Parameters
    ----------
    config : str or Path
        A run config file (layout: configs/README.md), validated before anything runs.
    workers : int, optional
        Local worker processes; 0 (default) uses every core. Under MPI each rank is one.
    progress : bool, optional
        Show a progress bar on stderr. Default False.
    plan_only : bool, optional
        Validate and plan (EOS states, tasks), simulate nothing. Default False.

    Returns
    -------
    BuildResult
        ``status`` ("written", "up_to_date", "planned", "incomplete" or "worker"),
        ``path``, ``plan``, ``data`` (the KernelData), ``fits``, ``report`` (tasks run,
        reused, failed), ``missing``, ``wall_seconds``, ``workers``, ``ranks``; ``ok`` is
        True when the kernel file exists.

    Raises
    ------
    InputError
        A bad config field, a state the EOS refuses, or another build holding the lock.

    Examples
    --------
    >>> from gcmc.api import build_kernel, open_kernel
    >>> built = build_kernel("configs/quickstart.toml", workers=2)  # doctest: +SKIP
    >>> built.status, built.path.name  # doctest: +SKIP
    ('written', 'quickstart-methane-298K.v1.h5')
    >>> kernel = open_kernel(built.path)  # doctest: +SKIP
    """
    from gcmc.pipeline.build import build_kernel as _build

    return _build(config, workers=workers, progress=progress, plan_only=plan_only)


def open_kernel(path: str | Path) -> Kernel:
    """Open and verify a kernel file (schema version and checksums).

    Parameters
    ----------
    path : str or Path
        A kernel file (``<name>.v<N>.h5``).

    Returns
    -------
    Kernel
        Named fields: ``name``, ``version``, ``temperatures_K``, ``widths_H_nm``,
        ``widths_w_nm``, ``data`` (every stored array, a KernelData), ``info``
        (checksums, provenance); ``evaluate(pressures_Pa, widths_nm, temperature_K)``
        gives the kernel matrix.

    Raises
    ------
    InputError
        A missing file, an unknown schema or a checksum mismatch.

    Examples
    --------
    >>> from gcmc.api import open_kernel
    >>> k = open_kernel("runs/quickstart/quickstart-methane-298K.v1.h5")  # doctest: +SKIP
    >>> k.evaluate([1e4, 1e5], [0.5, 1.0], temperature_K=298.15).shape  # doctest: +SKIP
    (2, 2)
    """
    return _open_kernel(path)


def _as_kernel(kernel: Kernel | str | Path) -> Kernel:
    return kernel if isinstance(kernel, Kernel) else _open_kernel(kernel)


@dataclass
class CheckResult:
    """The quality checks of one kernel.

    Attributes
    ----------
    verdict : str
        The worst verdict: "pass", "warn" or "fail" ("info" criteria report numbers and
        never change it).
    passed : bool
        True unless a criterion failed (the command's exit code 0).
    criteria : list of Criterion
        Each with ``key``, ``title``, ``verdict``, ``measured``, ``threshold``, ``details``
        and ``data``.
    report : CheckReport
        The full report (resolving power, round trips, settings); ``report.to_dict()`` is
        the JSON of ``gcmc check --json``.
    files : list of Path
        The report's figures and check.json (when ``report_dir`` was given).
    """

    verdict: str
    passed: bool
    criteria: list[Criterion]
    report: CheckReport
    files: list[Path] = field(default_factory=list)

    def criterion(self, key: str) -> Criterion:
        """The criterion named ``key`` (e.g. ``"point_errors"``); KeyError if absent."""
        return self.report.criterion(key)


def check_kernel(
    kernel: Kernel | str | Path,
    *,
    target_rel_stderr: float = 0.02,
    noise_rel: float = 0.01,
    noise_abs_mmol_cm3: float = 0.01,
    pressures_Pa: Sequence[float] | np.ndarray | None = None,
    temperature_K: float | None = None,
    chi2_threshold: float = 1.0,
    resolution_fraction: float = 0.25,
    inversion: str = "gcv",
    realisations: int = 12,
    pore_volume_cm3_g: float = 0.5,
    seed: int = 2026,
    report_dir: str | Path | None = None,
) -> CheckResult:
    """Judge a kernel before it is used to invert isotherms (the checks of ``gcmc check``).

    Parameters
    ----------
    kernel : Kernel, str or Path
        An open kernel or a kernel file.
    target_rel_stderr : float, optional
        Target relative standard error of a point (the name of the run config's
        ``[sampling] target_rel_stderr``). Default 0.02.
    noise_rel, noise_abs_mmol_cm3 : float, optional
        The experiment's noise, combined in quadrature: sigma = sqrt((r n)^2 + a^2), n in
        mmol per cm^3 of pore volume. Defaults 0.01 and 0.01.
    pressures_Pa : sequence of float, optional
        The experiment's pressures (default: the kernel's own).
    temperature_K : float, optional
        Check this kernel temperature only (default: every one).
    chi2_threshold : float, optional
        Delta-chi2 at which two isotherms count as distinguishable. Default 1.
    resolution_fraction : float, optional
        A width w is resolved when pores at w(1 -+ fraction) can be told from one. Default
        0.25.
    inversion : str, optional
        ``"gcv"`` or ``"l-curve"``: how the reference inversion picks its regularisation.
    realisations : int, optional
        Noise realisations per synthetic pore-size distribution. Default 12.
    pore_volume_cm3_g : float, optional
        Total pore volume of the synthetic samples. Default 0.5.
    seed : int, optional
        Seed of the synthetic noise. Default 2026.
    report_dir : str or Path, optional
        Write the figures (PNG, PDF) and check.json there.

    Returns
    -------
    CheckResult
        ``verdict``, ``passed``, ``criteria``, ``report``, ``files``.

    Examples
    --------
    >>> from gcmc.api import check_kernel
    >>> checked = check_kernel("runs/quickstart/quickstart-methane-298K.v1.h5",
    ...                        realisations=4)  # doctest: +SKIP
    >>> [c.key for c in checked.criteria][:3]  # doctest: +SKIP
    ['point_errors', 'point_flags', 'monotonic']
    >>> checked.passed == (checked.verdict != "fail")  # doctest: +SKIP
    True
    """
    from gcmc.quality.criteria import CheckSettings, run_checks
    from gcmc.quality.resolution import NoiseModel

    k = _as_kernel(kernel)
    for name, value in (
        ("noise_rel", noise_rel),
        ("noise_abs_mmol_cm3", noise_abs_mmol_cm3),
    ):
        if not (isinstance(value, int | float) and math.isfinite(value) and value >= 0):
            raise InputError(f"{name}: must be a finite number >= 0, got {value!r}")
    if noise_rel == 0 and noise_abs_mmol_cm3 == 0:
        raise InputError("noise_rel/noise_abs_mmol_cm3: cannot both be 0")
    p = None
    if pressures_Pa is not None:
        p = np.asarray(pressures_Pa, dtype=float)
        if p.ndim != 1 or p.size < 2 or not np.all(np.isfinite(p)) or np.any(p <= 0):
            raise InputError("pressures_Pa: need at least 2 finite pressures > 0 Pa")
    temps = None
    if temperature_K is not None:
        k.temperature_index(float(temperature_K))  # InputError naming the kernel's ones
        temps = (float(temperature_K),)
    settings = CheckSettings(
        target_rel_stderr=target_rel_stderr,
        noise=NoiseModel(noise_rel, noise_abs_mmol_cm3),
        pressures_Pa=p,
        temperatures_K=temps,
        chi2_threshold=chi2_threshold,
        resolution_fraction=resolution_fraction,
        realisations=realisations,
        seed=seed,
        pore_volume_cm3_g=pore_volume_cm3_g,
        inversion_method=inversion,
    )
    report = run_checks(k, settings)
    files: list[Path] = []
    if report_dir is not None:
        from gcmc.quality.report import write_report

        files = list(write_report(report, k, report_dir))
    return CheckResult(
        verdict=report.verdict,
        passed=report.exit_code == 0,
        criteria=list(report.criteria),
        report=report,
        files=files,
    )


@dataclass
class DiffResult:
    """What changed between two kernels of one probe.

    Attributes
    ----------
    agree : bool
        True when no width deviates by more than ``max_sigma`` combined standard errors.
    largest_sigma : float
        The largest deviation found, in combined standard errors.
    max_sigma : float
        The threshold used.
    changes : list of tuple
        (section, field, value in A, value in B) for every model, EOS or grid field that
        differs.
    widths : list of dict
        Per temperature and width of A: the largest deviation and where it is.
    grids_identical : bool
        True when both kernels share temperatures, widths and pressures.
    report : DiffReport
        The full report; ``report.to_dict()`` is the JSON of ``gcmc diff --json``.
    """

    agree: bool
    largest_sigma: float
    max_sigma: float
    changes: list[tuple[str, str, str, str]]
    widths: list[dict[str, Any]]
    grids_identical: bool
    report: DiffReport

    def to_dict(self) -> dict[str, Any]:
        """The JSON of ``gcmc diff --json``."""
        return self.report.to_dict()


def diff_kernels(
    a: Kernel | str | Path, b: Kernel | str | Path, *, max_sigma: float = 3.0
) -> DiffResult:
    """Compare two kernels of the same probe (the comparison of ``gcmc diff``).

    Parameters
    ----------
    a, b : Kernel, str or Path
        Open kernels or kernel files; B is compared on A's widths and pressures (through its
        fits where the grids differ).
    max_sigma : float, optional
        Largest deviation, in combined standard errors, for the kernels to agree. Default 3.

    Returns
    -------
    DiffResult
        ``agree``, ``largest_sigma``, ``max_sigma``, ``changes``, ``widths``,
        ``grids_identical``, ``report``.

    Raises
    ------
    InputError
        Kernels of different probes, or a bad ``max_sigma``.

    Examples
    --------
    >>> from gcmc.api import diff_kernels
    >>> d = diff_kernels("runs/a/k.v1.h5", "runs/a/k.v2.h5")  # doctest: +SKIP
    >>> d.changes[0]  # doctest: +SKIP
    ('kernel', 'version', '1', '2')
    >>> d.agree == (d.largest_sigma <= d.max_sigma)  # doctest: +SKIP
    True
    """
    from gcmc.quality.diff import diff_kernels as _diff

    rep = _diff(_as_kernel(a), _as_kernel(b), max_sigma=max_sigma)
    largest = float(rep.largest())
    return DiffResult(
        agree=largest <= rep.max_sigma,
        largest_sigma=largest,
        max_sigma=float(rep.max_sigma),
        changes=list(rep.changes),
        widths=list(rep.widths),
        grids_identical=bool(rep.grids_identical),
        report=rep,
    )
