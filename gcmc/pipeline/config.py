"""Run configs (TOML): parse and validate every field before any simulation starts.

Each problem is an InputError naming the file and the field. The layout is documented in
configs/README.md and by the example configs in configs/.
"""

from __future__ import annotations

import hashlib
import json
import math
import tomllib
import warnings
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from gcmc.errors import InputError
from gcmc.kernel.forms import DEFAULT_FORMS as FIT_DEFAULT_FORMS
from gcmc.physics.model import (
    Probe,
    Solid,
    default_solid,
    get_probe,
    probe_from_table,
    solid_from_table,
)
from gcmc.physics.potentials import (
    LATERAL_BOXES,
    default_box_nm,
    default_cutoff_nm,
    lateral_box_nm,
)
from gcmc.physics.units import MMOL_PER_CM3_PER_NM3
from gcmc.quality.target import QualityTarget
from gcmc.sampling.point import SECOND_REPLICA_STARTS, SamplingSettings

KNOWN_SECTIONS = {
    "kernel",
    "probe",
    "solid",
    "model",
    "widths",
    "temperatures",
    "pressures",
    "eos",
    "sampling",
    "fit",
    "seed",
    "target",
    "equilibrium",
}


@dataclass(frozen=True)
class PressureGrid:
    """The pressure grid of a build: absolute (Pa) or relative (p/p0) values."""

    kind: str  # "absolute" (values in Pa) or "relative" (values are p/p0)
    values: tuple[float, ...]
    descending: bool  # also run the desorption branch


@dataclass(frozen=True)
class FitOptions:
    """How isotherms are fitted: the forms tried, the acceptance threshold, the policy above
    the simulated range and the size of the dense table."""

    forms: tuple[str, ...] = FIT_DEFAULT_FORMS
    p_value_min: float = 1e-3
    above_range: str = "clamp"
    dense_points: int = 200


#: The critical temperature of the full-potential LJ 12-6 fluid in units of epsilon/k: the
#: simulated fluid's own (the cutoff with the slab tail correction approximates the full
#: potential). Potoff & Panagiotopoulos, J. Chem. Phys. 109 (1998) 10914: T_c* = 1.3120(7)
#: (from memory).
LJ_CRITICAL_TEMPERATURE = 1.3120
#: ... and its critical pressure, p_c* = p_c sigma^3 / epsilon (same source, p_c* ~ 0.128).
LJ_CRITICAL_PRESSURE = 0.128


@dataclass(frozen=True)
class EquilibriumSettings:
    """The ``[equilibrium]`` table: the reversible path that anchors the liquid branch's grand
    potential of every pore with a hysteresis loop (gcmc.pipeline.anchor).

    ``hot_temperature_factor`` x the bulk critical temperature (the larger of the probe's
    real-gas T_c and the LJ model fluid's 1.312 epsilon/k) is the temperature of the path's
    supercritical isotherm, unless ``hot_temperature_K`` is given. A pore's critical
    temperature lies below the bulk's (capillary critical point; Evans, J. Phys.: Condens.
    Matter 2 (1990) 8989, from memory), so an isotherm above the bulk T_c crosses no
    transition in any pore (common practice). ``isotherm_states``, ``cooling_states`` and
    ``liquid_states`` are the states of the path's three legs, ends included (the legs share
    their end states); ``dilute_density_sigma3`` is the Henry-law density n sigma^3 of the
    first, dilute state."""

    hot_temperature_factor: float = 1.1
    hot_temperature_K: float = 0.0  # 0: hot_temperature_factor x T_c
    isotherm_states: int = 10
    cooling_states: int = 6
    liquid_states: int = 3
    dilute_density_sigma3: float = 1.0e-3

    def to_dict(self) -> dict[str, Any]:
        """The settings as a plain dict (for the config hash and the provenance)."""
        return dict(self.__dict__)


def bulk_critical_temperature_K(probe: Probe) -> float:
    """The bulk critical temperature the anchor path stays above: the larger of the probe's
    real-gas T_c (where given) and the LJ model fluid's (LJ_CRITICAL_TEMPERATURE)."""
    tc = LJ_CRITICAL_TEMPERATURE * probe.epsilon_k
    real = probe.critical_temperature_K
    return max(tc, real) if math.isfinite(real) else tc


@dataclass(frozen=True)
class RunConfig:
    """A validated build configuration (from a TOML file; see :func:`parse_config`)."""

    path: Path
    text: str
    name: str
    output: Path
    probe: Probe
    solid: Solid
    cutoff_nm: float
    box_nm: float
    widths_H_nm: tuple[float, ...]
    temperatures_K: tuple[float, ...]
    pressures: PressureGrid
    eos: str
    sampling: SamplingSettings
    fit: FitOptions
    seed: int
    #: "square" (box_nm x box_nm) or "hexagonal" (box_nm x box_y_nm, whole close-packed rows)
    lateral_box: str = "square"
    box_y_nm: float = 0.0
    #: the [target] table (None: no target; the build runs exactly the config's grid)
    target: QualityTarget | None = None
    #: the [equilibrium] table (None: no equilibrium branch is computed)
    equilibrium: EquilibriumSettings | None = None

    @property
    def equilibrium_tag(self) -> str:
        """8 hex digits of the [equilibrium] settings ("" without the table): part of an
        anchor task's key."""
        if self.equilibrium is None:
            return ""
        blob = json.dumps(self.equilibrium.to_dict(), sort_keys=True).encode()
        return hashlib.sha256(blob).hexdigest()[:8]

    @property
    def hot_temperature_K(self) -> float:
        """The anchor path's supercritical temperature (NaN without [equilibrium])."""
        e = self.equilibrium
        if e is None:
            return float("nan")
        if e.hot_temperature_K > 0:
            return e.hot_temperature_K
        return e.hot_temperature_factor * bulk_critical_temperature_K(self.probe)

    @property
    def refining(self) -> bool:
        """True when the build refines its kernel towards the target."""
        return self.target is not None and self.target.refine and self.target.max_rounds > 0

    @property
    def config_hash(self) -> str:
        """Hash of everything that changes the kernel's data (not the output folder)."""
        canon = self._canon()
        if self.target is not None:
            # the point-error target keeps its key from before the rename to
            # target_rel_stderr, so that configs built before keep their hash
            canon["target"] = {
                ("target_rel_error" if k == "target_rel_stderr" else k): v
                for k, v in self.target.to_dict().items()
            }
        blob = json.dumps(canon, sort_keys=True, default=str).encode()
        return hashlib.sha256(blob).hexdigest()

    @property
    def task_hash(self) -> str:
        """Hash of everything that changes a task's result: the config less its target (a
        task file does not depend on why it was asked for, so a changed target reuses them) and
        its [equilibrium] table (the ladders do not depend on it; an anchor task's key carries
        :attr:`equilibrium_tag`)."""
        canon = self._canon()
        canon.pop("equilibrium", None)
        blob = json.dumps(canon, sort_keys=True, default=str).encode()
        return hashlib.sha256(blob).hexdigest()

    def _canon(self) -> dict[str, Any]:
        return {
            "probe": self.probe.to_dict() | {"sources": None},
            "solid": self.solid.to_dict(),
            "cutoff_nm": self.cutoff_nm,
            "box_nm": self.box_nm,
            **(
                {"lateral_box": self.lateral_box, "box_y_nm": self.box_y_nm}
                if self.lateral_box != "square"
                else {}
            ),
            "widths_H_nm": self.widths_H_nm,
            "temperatures_K": self.temperatures_K,
            "pressures": [self.pressures.kind, self.pressures.values, self.pressures.descending],
            "eos": self.eos,
            # the key of replica_exchange stays "exchange" (its name before the rename), so
            # that configs built before keep their hash and their kernels stay up to date
            # stderr_floor_per_nm3, target_flags and second_replica enter only where set, for
            # the same reason
            "sampling": {
                ("exchange" if k == "replica_exchange" else k): v
                for k, v in self.sampling.__dict__.items()
                if not (k == "stderr_floor_per_nm3" and v == 0.0)
                and not (k == "target_flags" and v is True)
                and not (k == "second_replica" and v == "over-filled")
            },
            "fit": self.fit.__dict__,
            "seed": self.seed,
            "name": self.name,
            # enters only where set, so that configs without it keep their hash
            **({"equilibrium": self.equilibrium.to_dict()} if self.equilibrium is not None else {}),
        }


class _Fields:
    """Typed access to a TOML table, with errors that name file and field."""

    def __init__(self, where: str, table: Any):
        if not isinstance(table, dict):
            raise InputError(f"{where}: expected a table")
        self.where = where
        self.table = table
        self.used: set[str] = set()

    def _get(self, key: str, required: bool) -> Any:
        if key not in self.table:
            if required:
                raise InputError(f"{self.where}.{key}: missing")
            return None
        self.used.add(key)
        return self.table[key]

    def number(
        self, key: str, default: float | None = None, required: bool = False, positive: bool = True
    ) -> float | None:
        v = self._get(key, required and default is None)
        if v is None:
            return default
        if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
            raise InputError(f"{self.where}.{key}: expected a finite number, got {v!r}")
        if positive and v <= 0:
            raise InputError(f"{self.where}.{key}: must be > 0, got {v!r}")
        return float(v)

    def integer(self, key: str, default: int | None = None, minimum: int = 0) -> int | None:
        v = self._get(key, default is None)
        if v is None:
            return default
        if isinstance(v, bool) or not isinstance(v, int):
            raise InputError(f"{self.where}.{key}: expected an integer, got {v!r}")
        if v < minimum:
            raise InputError(f"{self.where}.{key}: must be >= {minimum}, got {v}")
        return int(v)

    def string(self, key: str, default: str | None = None, choices: tuple[str, ...] = ()) -> str:
        v = self._get(key, default is None)
        if v is None:
            return default  # type: ignore[return-value]
        if not isinstance(v, str):
            raise InputError(f"{self.where}.{key}: expected a string, got {v!r}")
        if choices and v not in choices:
            raise InputError(f"{self.where}.{key}: {v!r} is not one of {', '.join(choices)}")
        return v

    def boolean(self, key: str, default: bool) -> bool:
        v = self._get(key, False)
        if v is None:
            return default
        if not isinstance(v, bool):
            raise InputError(f"{self.where}.{key}: expected true or false, got {v!r}")
        return v

    def numbers(
        self, key: str, required: bool = False, positive: bool = True
    ) -> list[float] | None:
        v = self._get(key, required)
        if v is None:
            return None
        if not isinstance(v, list) or not v:
            raise InputError(f"{self.where}.{key}: expected a non-empty list of numbers")
        out = []
        for i, x in enumerate(v):
            if isinstance(x, bool) or not isinstance(x, int | float) or not math.isfinite(x):
                raise InputError(f"{self.where}.{key}[{i}]: expected a finite number, got {x!r}")
            if positive and x <= 0:
                raise InputError(f"{self.where}.{key}[{i}]: must be > 0, got {x!r}")
            out.append(float(x))
        return out

    def done(self) -> None:
        extra = set(self.table) - self.used
        if extra:
            raise InputError(f"{self.where}.{sorted(extra)[0]}: unknown field")


def _increasing(where: str, values: list[float]) -> None:
    for i in range(1, len(values)):
        if values[i] == values[i - 1]:
            raise InputError(f"{where}: duplicate value {values[i]:g}")
        if values[i] < values[i - 1]:
            raise InputError(
                f"{where}: values must be sorted increasing "
                f"({values[i - 1]:g} before {values[i]:g})"
            )


def _spaced(where: str, f: _Fields, lo_key: str, hi_key: str) -> list[float]:
    lo = f.number(lo_key, required=True)
    hi = f.number(hi_key, required=True)
    assert lo is not None and hi is not None
    if hi <= lo:
        raise InputError(f"{where}.{hi_key}: must be greater than {lo_key} ({hi:g} <= {lo:g})")
    count = f.integer("count", minimum=2)
    scale = f.string("scale", "log", ("log", "linear"))
    if scale == "log":
        return list(np.geomspace(lo, hi, count))
    return list(np.linspace(lo, hi, count))


def _widths(where: str, table: Any, sigma_ss: float) -> list[float]:
    f = _Fields(where, table)
    out: list[float] = []
    h = f.numbers("H_nm")
    w = f.numbers("w_nm")
    ranges = f._get("ranges", False)
    if sum(x is not None for x in (h, w, ranges)) != 1:
        raise InputError(f"{where}: give exactly one of H_nm, w_nm or ranges")
    if h is not None:
        out = h
    elif w is not None:
        out = [round(x + sigma_ss, 10) for x in w]
    else:
        if not isinstance(ranges, list) or not ranges:
            raise InputError(
                f"{where}.ranges: expected a list of tables {{from_nm, to_nm, step_nm}}"
            )
        for i, r in enumerate(ranges):
            rf = _Fields(f"{where}.ranges[{i}]", r)
            lo = rf.number("from_nm", required=True)
            hi = rf.number("to_nm", required=True)
            step = rf.number("step_nm", required=True)
            axis = rf.string("axis", "H", ("H", "w"))
            rf.done()
            assert lo is not None and hi is not None and step is not None
            if hi < lo:
                raise InputError(f"{where}.ranges[{i}].to_nm: must be >= from_nm")
            n = int(math.floor((hi - lo) / step + 1e-9))
            vals = [round(lo + k * step, 10) for k in range(n + 1)]
            if axis == "w":
                vals = [round(v + sigma_ss, 10) for v in vals]
            if out and abs(vals[0] - out[-1]) < 1e-9:
                vals = vals[1:]  # ranges that share an end point
            out.extend(vals)
    f.done()
    _increasing(f"{where}", out)
    for x in out:
        if x <= sigma_ss:
            raise InputError(
                f"{where}: width H = {x:g} nm is not wider than sigma_ss "
                f"({sigma_ss:g} nm): no pore volume"
            )
    return out


def _target_rel_stderr(f: _Fields, default: float) -> float:
    """``[target] target_rel_stderr`` (the name of ``gcmc check --target-rel-stderr`` and of
    ``[sampling] target_rel_stderr``); the old key ``target_rel_error`` is still read, with a
    warning."""
    if "target_rel_error" in f.table:
        if "target_rel_stderr" in f.table:
            raise InputError(
                f"{f.where}.target_rel_error: give target_rel_stderr only "
                "(target_rel_error is its old name)"
            )
        warnings.warn(
            f"{f.where}.target_rel_error: deprecated key; write target_rel_stderr",
            FutureWarning,
            stacklevel=3,
        )
        return f.number("target_rel_error", default)  # type: ignore[return-value]
    return f.number("target_rel_stderr", default)  # type: ignore[return-value]


def _replica_exchange(sf: _Fields, default: bool) -> bool:
    """``[sampling] replica_exchange``; the old key ``exchange`` is still read, with a
    warning (it named replica swaps, easily confused with reservoir exchanges)."""
    if "exchange" in sf.table:
        if "replica_exchange" in sf.table:
            raise InputError(
                f"{sf.where}.exchange: give replica_exchange only (exchange is its old name)"
            )
        warnings.warn(
            f"{sf.where}.exchange: deprecated key; write replica_exchange",
            FutureWarning,
            stacklevel=3,
        )
        return sf.boolean("exchange", default)
    return sf.boolean("replica_exchange", default)


def load_config(path: str | Path) -> RunConfig:
    """Read and validate a run config; raise InputError naming the first bad field."""
    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise InputError(f"{path}: file not found") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc})") from None
    return parse_config(data, text, path)


def parse_config(data: dict[str, Any], text: str, path: Path) -> RunConfig:
    """Validate a parsed TOML config into a RunConfig; InputError naming the first bad field."""
    p = path.name
    for key in data:
        if key not in KNOWN_SECTIONS:
            raise InputError(f"{p}: {key}: unknown section")
    kf = _Fields(f"{p}: kernel", data.get("kernel", {}))
    name = kf.string("name")
    if not name or any(c in name for c in "/\\ ") or name.startswith("."):
        raise InputError(f"{p}: kernel.name: must be a plain file name without spaces or slashes")
    output = kf.string("output", "kernels")
    kf.done()
    out_dir = (path.parent / output).resolve() if not Path(output).is_absolute() else Path(output)

    # probe: a library name, or an inline table
    if "probe" not in data:
        raise InputError(f"{p}: probe: missing (a library name or a table)")
    pt = data["probe"]
    if isinstance(pt, str):
        probe = get_probe(pt)
    elif isinstance(pt, dict) and "library_name" in pt:
        lib = pt.get("library")
        lib_path = (path.parent / lib) if isinstance(lib, str) else None
        extra = set(pt) - {"library_name", "library"}
        if extra:
            raise InputError(f"{p}: probe.{sorted(extra)[0]}: unknown field next to library_name")
        probe = get_probe(str(pt["library_name"]), lib_path)
    else:
        probe = probe_from_table(
            str(pt.get("name", "inline")) if isinstance(pt, dict) else "", pt, where=f"{p}: probe"
        )

    solid = solid_from_table(
        "graphite", data.get("solid", {}), where=f"{p}: solid", base=default_solid()
    )

    mf = _Fields(f"{p}: model", data.get("model", {}))
    cutoff = mf.number("cutoff_nm", default_cutoff_nm(probe))
    assert cutoff is not None
    lateral = mf.string("lateral_box", "square", LATERAL_BOXES)
    box_y = 0.0
    if lateral == "square":
        box = mf.number("box_nm", default_box_nm(cutoff, probe.sigma_nm))
    else:
        if "box_nm" in (data.get("model") or {}):
            raise InputError(
                f"{p}: model.box_nm: not used with lateral_box = {lateral!r} (the box follows "
                "from the probe's sigma and the cutoff)"
            )
        box, box_y, _ = lateral_box_nm(lateral, cutoff, probe.sigma_nm)
    assert box is not None
    mf.done()
    if cutoff > 0.5 * box:
        raise InputError(
            f"{p}: model.cutoff_nm: {cutoff:g} nm is larger than half the lateral box ({box:g} nm)"
        )

    if "widths" not in data:
        raise InputError(f"{p}: widths: missing")
    widths = _widths(f"{p}: widths", data["widths"], solid.sigma_nm)

    tf = _Fields(f"{p}: temperatures", data.get("temperatures", {}))
    temps = tf.numbers("K", required=True)
    tf.done()
    assert temps is not None
    _increasing(f"{p}: temperatures.K", temps)

    ef = _Fields(f"{p}: eos", data.get("eos", {}))
    from gcmc.physics.eos import EOS_NAMES

    eos = ef.string("name", "reference" if probe.reference_eos else "lennard-jones", EOS_NAMES)
    ef.done()
    if eos == "reference" and not probe.reference_eos:
        raise InputError(
            f"{p}: eos.name: probe {probe.name!r} has no reference equation of state;"
            " use peng-robinson, lennard-jones or ideal"
        )

    if "pressures" not in data:
        raise InputError(f"{p}: pressures: missing")
    pf = _Fields(f"{p}: pressures", data["pressures"])
    kinds = [k for k in ("Pa", "p_p0", "from_Pa", "from_p_p0") if k in pf.table]
    if len(kinds) != 1:
        raise InputError(
            f"{p}: pressures: give exactly one of Pa, p_p0, from_Pa/to_Pa, from_p_p0/to_p_p0"
        )
    kind = kinds[0]
    if kind == "Pa":
        values = pf.numbers("Pa", required=True)
    elif kind == "p_p0":
        values = pf.numbers("p_p0", required=True)
    elif kind == "from_Pa":
        values = _spaced(f"{p}: pressures", pf, "from_Pa", "to_Pa")
    else:
        values = _spaced(f"{p}: pressures", pf, "from_p_p0", "to_p_p0")
    descending = pf.boolean("descending", False)
    pf.done()
    assert values is not None
    _increasing(f"{p}: pressures", values)
    relative = kind in ("p_p0", "from_p_p0")
    if relative:
        if values[-1] > 1.0 + 1e-12:
            raise InputError(f"{p}: pressures: p/p0 above 1 ({values[-1]:g}) is beyond saturation")
        tc = probe.critical_temperature_K
        for t in temps:
            if eos != "lennard-jones" and math.isfinite(tc) and t >= tc:
                raise InputError(
                    f"{p}: pressures: p/p0 needs a subcritical temperature; "
                    f"{t:g} K >= Tc = {tc:g} K"
                )
    grid = PressureGrid(
        kind="relative" if relative else "absolute", values=tuple(values), descending=descending
    )

    sf = _Fields(f"{p}: sampling", data.get("sampling", {}))
    d = SamplingSettings()
    # target_rel_stderr = "target": production aims at the [target]'s point-error rule (set
    # below, once the [target] is read); the number parsed here is then the default, 0
    aim_at_target = sf.table.get("target_rel_stderr") == "target"
    if aim_at_target:
        sf.table = {k: v for k, v in sf.table.items() if k != "target_rel_stderr"}
    sampling = replace(
        d,
        equilibration_moves=sf.integer("equilibration_moves", d.equilibration_moves, 0),
        production_moves=sf.integer("production_moves", d.production_moves, 1),
        sample_every=sf.integer("sample_every", d.sample_every, 1),
        insertion_trials=sf.integer("insertion_trials", d.insertion_trials, 0),
        biased_trials=sf.integer("biased_trials", d.biased_trials, 2),
        bias_threshold=sf.number("bias_threshold", d.bias_threshold),  # type: ignore[arg-type]
        replicas=sf.integer("replicas", d.replicas, 1),
        second_replica=sf.string("second_replica", d.second_replica, SECOND_REPLICA_STARTS),
        target_rel_stderr=sf.number("target_rel_stderr", d.target_rel_stderr, positive=False),
        max_production_moves=sf.integer("max_production_moves", d.max_production_moves, 0),
        replica_exchange=_replica_exchange(sf, d.replica_exchange),
    )
    sf.done()
    try:
        sampling.validate()
    except InputError as exc:
        raise InputError(f"{p}: {exc}") from None

    ff = _Fields(f"{p}: fit", data.get("fit", {}))
    forms = ff._get("forms", False)
    from gcmc.kernel.forms import FORMS

    if forms is None:
        forms = list(FIT_DEFAULT_FORMS)
    if not isinstance(forms, list) or not all(isinstance(x, str) for x in forms) or not forms:
        raise InputError(f"{p}: fit.forms: expected a list of form names")
    for fname in forms:
        if fname not in FORMS:
            raise InputError(
                f"{p}: fit.forms: unknown form {fname!r}; known: {', '.join(sorted(FORMS))}"
            )
    fit = FitOptions(
        forms=tuple(forms),
        p_value_min=ff.number("p_value_min", 1e-3),  # type: ignore[arg-type]
        above_range=ff.string("above_range", "clamp", ("clamp", "refuse")),
        dense_points=ff.integer("dense_points", 200, 10),  # type: ignore[arg-type]
    )
    ff.done()

    seed = data.get("seed", 2026)
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise InputError(f"{p}: seed: expected a non-negative integer, got {seed!r}")

    target = _target(f"{p}: target", data["target"]) if "target" in data else None
    equilibrium = None
    if "equilibrium" in data:
        equilibrium = _equilibrium(f"{p}: equilibrium", data["equilibrium"], probe, temps, grid)
    if aim_at_target:
        # the sampler aims at the target's point-error rule (gcmc check's point_errors, with
        # the experiment's absolute noise as the floor): a point runs on, within
        # max_production_moves, until its error meets it, instead of being rerun later
        if target is None:
            raise InputError(f'{p}: sampling.target_rel_stderr: "target" needs a [target] table')
        sampling = replace(
            sampling,
            target_rel_stderr=target.target_rel_stderr,
            stderr_floor_per_nm3=target.noise_abs_mmol_cm3 / MMOL_PER_CM3_PER_NM3,
            target_flags=False,
        )

    return RunConfig(
        path=path,
        text=text,
        name=name,
        output=out_dir,
        probe=probe,
        solid=solid,
        cutoff_nm=cutoff,
        box_nm=box,
        widths_H_nm=tuple(widths),
        temperatures_K=tuple(temps),
        pressures=grid,
        eos=eos,
        sampling=sampling,
        fit=fit,
        seed=seed,
        lateral_box=lateral,
        box_y_nm=box_y,
        target=target,
        equilibrium=equilibrium,
    )


def _equilibrium(
    where: str, table: Any, probe: Probe, temps: list[float], grid: PressureGrid
) -> EquilibriumSettings:
    """The [equilibrium] table (EquilibriumSettings), validated against the grid."""
    f = _Fields(where, table)
    d = EquilibriumSettings()
    if not grid.descending:
        raise InputError(
            f"{where}: needs pressures.descending = true (a loop needs the desorption branch)"
        )
    if "hot_temperature_K" in f.table and "hot_temperature_factor" in f.table:
        raise InputError(f"{where}: give at most one of hot_temperature_K, hot_temperature_factor")
    s = EquilibriumSettings(
        hot_temperature_factor=f.number("hot_temperature_factor", d.hot_temperature_factor),  # type: ignore[arg-type]
        hot_temperature_K=f.number("hot_temperature_K", d.hot_temperature_K, positive=False),  # type: ignore[arg-type]
        isotherm_states=f.integer("isotherm_states", d.isotherm_states, 3),  # type: ignore[arg-type]
        cooling_states=f.integer("cooling_states", d.cooling_states, 2),  # type: ignore[arg-type]
        liquid_states=f.integer("liquid_states", d.liquid_states, 2),  # type: ignore[arg-type]
        dilute_density_sigma3=f.number("dilute_density_sigma3", d.dilute_density_sigma3),  # type: ignore[arg-type]
    )
    f.done()
    tc = bulk_critical_temperature_K(probe)
    if "hot_temperature_factor" in f.table and s.hot_temperature_factor <= 1.0:
        raise InputError(
            f"{where}.hot_temperature_factor: must be > 1 (the path runs above the bulk "
            f"T_c = {tc:g} K), got {s.hot_temperature_factor:g}"
        )
    if "hot_temperature_K" in f.table and s.hot_temperature_K <= tc:
        raise InputError(
            f"{where}.hot_temperature_K: must be above the bulk critical temperature "
            f"{tc:g} K, got {s.hot_temperature_K:g}"
        )
    if not s.dilute_density_sigma3 < 0.1:
        raise InputError(
            f"{where}.dilute_density_sigma3: must be < 0.1 (a Henry-law start), got "
            f"{s.dilute_density_sigma3:g}"
        )
    return s


def _target(where: str, table: Any) -> QualityTarget:
    """The [target] table: the experiment, the tolerances and the budget."""
    f = _Fields(where, table)
    d = QualityTarget()
    pressures = f.numbers("pressures_Pa")
    p_range = f.numbers("p_range_Pa")
    p_points = f.integer("p_points", 30, 2)
    if pressures is not None and p_range is not None:
        raise InputError(f"{where}: give at most one of pressures_Pa and p_range_Pa")
    if p_range is not None:
        if len(p_range) != 2 or not p_range[0] < p_range[1]:
            raise InputError(f"{where}.p_range_Pa: expected [low, high] with low < high")
        pressures = list(np.geomspace(p_range[0], p_range[1], int(p_points or 30)))
    elif "p_points" in f.table:
        raise InputError(f"{where}.p_points: needs p_range_Pa")
    if pressures is not None:
        _increasing(f"{where}.pressures_Pa", pressures)
    max_rounds = f.integer("max_rounds", d.max_rounds, 0)
    target = QualityTarget(
        refine=f.boolean("refine", True),
        noise_rel=f.number("noise_rel", d.noise_rel, positive=False),  # type: ignore[arg-type]
        noise_abs_mmol_cm3=f.number(  # type: ignore[arg-type]
            "noise_abs_mmol_cm3", d.noise_abs_mmol_cm3, positive=False
        ),
        pressures_Pa=None if pressures is None else tuple(float(x) for x in pressures),
        target_rel_stderr=_target_rel_stderr(f, d.target_rel_stderr),
        width_tolerance=f.number("width_tolerance", d.width_tolerance),  # type: ignore[arg-type]
        cpu_hours=f.number("cpu_hours", d.cpu_hours),  # type: ignore[arg-type]
        cpu_hours_per_point=f.number("cpu_hours_per_point", None),
        min_spacing_nm=f.number("min_spacing_nm", d.min_spacing_nm),  # type: ignore[arg-type]
        max_rounds=int(max_rounds if max_rounds is not None else d.max_rounds),
    )
    f.done()
    target.validate(where)
    return target
