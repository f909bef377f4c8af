"""The quality target of a kernel: the experiment it will serve and how good it must be.

A run config states it in its ``[target]`` table (``configs/README.md``); the build refines
its kernel until the target is met or the budget is spent (:mod:`gcmc.pipeline.refine`), the
target travels into the kernel's provenance, and ``gcmc check KERNEL`` with no options judges
the kernel against it. :func:`check_settings` turns a target into the check's settings.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from gcmc.errors import InputError

#: defaults; the noise and the point-error target are the check's own defaults
DEFAULT_NOISE_REL = 0.01
DEFAULT_NOISE_ABS_MMOL_CM3 = 0.01
DEFAULT_TARGET_REL_STDERR = 0.02
#: interpolation in width may err by this fraction of the experiment's noise (on top of the
#: statistical allowance the check grants); below 1 so that a refined kernel passes the check
DEFAULT_WIDTH_TOLERANCE = 0.5
DEFAULT_CPU_HOURS = 1.0
DEFAULT_MIN_SPACING_NM = 0.0125
DEFAULT_MAX_ROUNDS = 6


@dataclass(frozen=True)
class QualityTarget:
    """What a kernel must achieve, and what the build may spend on it.

    Attributes
    ----------
    refine : bool
        Refine the width grid and rerun points until the target is met (False: build exactly
        the config's grid once; the target is still stored and used by ``gcmc check``).
    noise_rel, noise_abs_mmol_cm3 : float
        The experiment's noise model, sigma(n) = sqrt((noise_rel n)^2 + noise_abs^2), n in
        mmol per cm3 of pore volume (as ``gcmc check --noise-rel/--noise-abs-mmol-cm3``).
    pressures_Pa : tuple of float or None
        The experiment's pressures (Pa); None: the kernel's own.
    target_rel_stderr : float
        Target relative standard error of a point (as ``gcmc check --target-rel-stderr``;
        the config key's old name ``target_rel_stderr`` is still read).
    width_tolerance : float
        Allowed mid-interval error of linear interpolation in width, as a fraction of the
        experiment's noise at that loading (added to the check's statistical allowance).
    cpu_hours : float
        CPU budget of the whole build, hours (first pass included).
    cpu_hours_per_point : float
        CPU budget of the reruns of one point, hours.
    min_spacing_nm : float
        Widths are not refined below this spacing (H axis); such an interval is reported as
        unresolvable.
    max_rounds : int
        Refinement rounds after the first pass, at most.
    """

    refine: bool = True
    noise_rel: float = DEFAULT_NOISE_REL
    noise_abs_mmol_cm3: float = DEFAULT_NOISE_ABS_MMOL_CM3
    pressures_Pa: tuple[float, ...] | None = None
    target_rel_stderr: float = DEFAULT_TARGET_REL_STDERR
    width_tolerance: float = DEFAULT_WIDTH_TOLERANCE
    cpu_hours: float = DEFAULT_CPU_HOURS
    cpu_hours_per_point: float | None = None
    min_spacing_nm: float = DEFAULT_MIN_SPACING_NM
    max_rounds: int = DEFAULT_MAX_ROUNDS

    def __post_init__(self) -> None:
        if self.cpu_hours_per_point is None:
            object.__setattr__(self, "cpu_hours_per_point", self.cpu_hours / 20.0)

    def validate(self, where: str = "target") -> None:
        """Raise InputError naming the first bad field (``where.field: problem``)."""
        for name in ("noise_rel", "noise_abs_mmol_cm3"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0.0):
                raise InputError(f"{where}.{name}: must be finite and >= 0, got {v!r}")
        if self.noise_rel == 0.0 and self.noise_abs_mmol_cm3 == 0.0:
            raise InputError(
                f"{where}.noise_rel: noise_rel and noise_abs_mmol_cm3 cannot both be 0"
            )
        for name in ("target_rel_stderr", "width_tolerance", "cpu_hours", "min_spacing_nm"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v > 0.0):
                raise InputError(f"{where}.{name}: must be finite and > 0, got {v!r}")
        v = self.cpu_hours_per_point
        if v is None or not (math.isfinite(v) and v > 0.0):
            raise InputError(f"{where}.cpu_hours_per_point: must be finite and > 0, got {v!r}")
        if v > self.cpu_hours:
            raise InputError(
                f"{where}.cpu_hours_per_point: {v:g} h is more than the whole budget "
                f"cpu_hours = {self.cpu_hours:g} h"
            )
        if self.width_tolerance > 1.0:
            raise InputError(
                f"{where}.width_tolerance: {self.width_tolerance:g} is above 1 (the "
                "experiment's noise): the kernel would not pass its own check"
            )
        if isinstance(self.max_rounds, bool) or not isinstance(self.max_rounds, int):
            raise InputError(f"{where}.max_rounds: expected an integer, got {self.max_rounds!r}")
        if self.max_rounds < 0:
            raise InputError(f"{where}.max_rounds: must be >= 0, got {self.max_rounds}")
        if self.pressures_Pa is not None:
            p = self.pressures_Pa
            if len(p) < 2:
                raise InputError(f"{where}.pressures_Pa: need at least 2 pressures")
            for i, x in enumerate(p):
                if not (math.isfinite(x) and x > 0.0):
                    raise InputError(f"{where}.pressures_Pa[{i}]: must be finite and > 0 Pa")
            if any(b <= a for a, b in zip(p[:-1], p[1:], strict=True)):
                raise InputError(f"{where}.pressures_Pa: must be sorted increasing, no repeats")

    @property
    def cpu_seconds(self) -> float:
        """The whole budget in CPU seconds."""
        return 3600.0 * self.cpu_hours

    @property
    def cpu_seconds_per_point(self) -> float:
        """The per-point rerun budget in CPU seconds."""
        return 3600.0 * float(self.cpu_hours_per_point or 0.0)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (stored in the kernel's provenance under ``target``)."""
        d = asdict(self)
        d["pressures_Pa"] = None if self.pressures_Pa is None else list(self.pressures_Pa)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any], where: str = "target") -> QualityTarget:
        """The target back from :meth:`to_dict` (e.g. from a kernel's provenance)."""
        if not isinstance(d, dict):
            raise InputError(f"{where}: expected a table")
        known = set(cls.__dataclass_fields__)
        extra = set(d) - known - {"target_rel_error"}
        if extra:
            raise InputError(f"{where}.{sorted(extra)[0]}: unknown field")
        kw = dict(d)
        if "target_rel_error" in kw:  # kernels built before the rename
            kw.setdefault("target_rel_stderr", kw.pop("target_rel_error"))
        if kw.get("pressures_Pa") is not None:
            kw["pressures_Pa"] = tuple(float(x) for x in kw["pressures_Pa"])
        t = cls(**kw)
        t.validate(where)
        return t

    def describe(self) -> str:
        """One line for the build's summary and ``gcmc show``."""
        p = (
            "the kernel's own pressures"
            if self.pressures_Pa is None
            else f"{len(self.pressures_Pa)} pressures {self.pressures_Pa[0]:.3g}-"
            f"{self.pressures_Pa[-1]:.3g} Pa"
        )
        return (
            f"noise sqrt(({self.noise_rel:g} n)^2 + ({self.noise_abs_mmol_cm3:g} mmol/cm3)^2) "
            f"on {p}; point error <= {self.target_rel_stderr:g}; width interpolation <= "
            f"{self.width_tolerance:g} x noise; budget {self.cpu_hours:g} CPU-h "
            f"({self.cpu_hours_per_point:.3g} per point); min spacing "
            f"{self.min_spacing_nm:g} nm; {self.max_rounds} round(s) at most"
            + ("" if self.refine else "; refinement off")
        )

    def pressures_array(self) -> np.ndarray | None:
        """The experiment's pressures as an array (None: the kernel's own)."""
        return None if self.pressures_Pa is None else np.asarray(self.pressures_Pa, float)


def check_settings(target: QualityTarget, **overrides: Any) -> Any:
    """The settings of ``gcmc check`` for a target (keyword arguments override fields of
    :class:`gcmc.quality.criteria.CheckSettings`)."""
    from gcmc.quality.criteria import CheckSettings
    from gcmc.quality.resolution import NoiseModel

    kw: dict[str, Any] = {
        "target_rel_stderr": target.target_rel_stderr,
        "noise": NoiseModel(target.noise_rel, target.noise_abs_mmol_cm3),
        "pressures_Pa": target.pressures_array(),
    }
    kw.update(overrides)
    return CheckSettings(**kw)
