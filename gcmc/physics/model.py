"""The physical model as data: probes, solids and the pore model that the engine simulates.

Probes and solids are read from TOML (the package's own gcmc/physics/data/probes.toml and
solids.toml, or a user's own file); nothing here is hard-wired physics beyond the combining rule.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import asdict, dataclass, field, replace
from importlib import resources
from pathlib import Path
from typing import Any

from gcmc.errors import InputError


def _library_file(name: str) -> Path:
    """A data file shipped inside the package (gcmc/physics/data/), found through
    importlib.resources so that it works from a wheel as well as from a source tree."""
    return Path(str(resources.files("gcmc.physics").joinpath("data", name)))


@dataclass(frozen=True)
class Probe:
    """A single-site Lennard-Jones probe gas."""

    name: str
    epsilon_k: float
    sigma_nm: float
    molar_mass_g_mol: float = float("nan")
    critical_temperature_K: float = float("nan")
    critical_pressure_Pa: float = float("nan")
    acentric_factor: float = float("nan")
    reference_eos: str = ""
    epsilon_sf_k: float | None = None
    sigma_sf_nm: float | None = None
    epsilon_sf_scale: float | None = None
    sources: dict[str, str] = field(default_factory=dict, compare=False)

    def to_dict(self) -> dict[str, Any]:
        """The probe as a plain dict (as stored in a kernel's ``/model/probe``)."""
        return asdict(self)


@dataclass(frozen=True)
class Solid:
    """A graphitic solid for the Steele 10-4-3 wall potential."""

    name: str = "graphite"
    density_nm3: float = 114.0
    interlayer_nm: float = 0.335
    epsilon_k: float = 28.0
    sigma_nm: float = 0.340
    epsilon_sf_scale: float = 1.0

    def to_dict(self) -> dict[str, Any]:
        """The solid as a plain dict (as stored in a kernel's ``/model/solid``)."""
        return asdict(self)


@dataclass(frozen=True)
class SolidFluid:
    """Solid-fluid parameters after mixing."""

    epsilon_k: float
    sigma_nm: float


def solid_fluid_parameters(probe: Probe, solid: Solid) -> SolidFluid:
    """Lorentz-Berthelot mixing unless the probe overrides eps_sf / sigma_sf / the scaling."""
    eps = probe.epsilon_sf_k
    if eps is None:
        eps = math.sqrt(probe.epsilon_k * solid.epsilon_k)
    scale = probe.epsilon_sf_scale if probe.epsilon_sf_scale is not None else solid.epsilon_sf_scale
    sig = (
        probe.sigma_sf_nm
        if probe.sigma_sf_nm is not None
        else 0.5 * (probe.sigma_nm + solid.sigma_nm)
    )
    return SolidFluid(epsilon_k=eps * scale, sigma_nm=sig)


_PROBE_FLOATS = (
    "epsilon_k",
    "sigma_nm",
    "molar_mass_g_mol",
    "critical_temperature_K",
    "critical_pressure_Pa",
    "acentric_factor",
)
_PROBE_OPTIONAL = ("epsilon_sf_k", "sigma_sf_nm", "epsilon_sf_scale")
_POSITIVE = {
    "epsilon_k",
    "sigma_nm",
    "molar_mass_g_mol",
    "critical_temperature_K",
    "critical_pressure_Pa",
    "epsilon_sf_k",
    "sigma_sf_nm",
    "epsilon_sf_scale",
}


def _number(where: str, key: str, value: Any, positive: bool) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(f"{where}.{key}: expected a number, got {value!r}")
    v = float(value)
    if not math.isfinite(v):
        raise InputError(f"{where}.{key}: must be finite, got {value!r}")
    if positive and v <= 0:
        raise InputError(f"{where}.{key}: must be > 0, got {value!r}")
    return v


def probe_from_table(name: str, table: dict[str, Any], where: str = "probe") -> Probe:
    """Build a Probe from a TOML table, validating every field (errors name the field)."""
    if not isinstance(table, dict):
        raise InputError(f"{where}: expected a table of probe parameters")
    known = set(_PROBE_FLOATS) | set(_PROBE_OPTIONAL) | {"reference_eos", "sources", "name"}
    for key in table:
        if key not in known:
            raise InputError(f"{where}.{key}: unknown probe field")
    kwargs: dict[str, Any] = {}
    for key in ("epsilon_k", "sigma_nm"):
        if key not in table:
            raise InputError(f"{where}.{key}: missing (a probe needs epsilon_k and sigma_nm)")
    for key in _PROBE_FLOATS + _PROBE_OPTIONAL:
        if key in table:
            kwargs[key] = _number(where, key, table[key], key in _POSITIVE)
    ref = table.get("reference_eos", "")
    if not isinstance(ref, str):
        raise InputError(f"{where}.reference_eos: expected a string")
    sources = table.get("sources", {})
    if not isinstance(sources, dict):
        raise InputError(f"{where}.sources: expected a table")
    return Probe(
        name=str(table.get("name", name)),
        reference_eos=ref,
        sources={str(k): str(v) for k, v in sources.items()},
        **kwargs,
    )


def _read_toml(path: Path) -> dict[str, Any]:
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(f"{path}: file not found") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc})") from None


def load_probe_library(path: Path | None = None) -> dict[str, Probe]:
    """All probes of a library file (default: the package's probes.toml)."""
    path = Path(path) if path is not None else _library_file("probes.toml")
    data = _read_toml(path)
    return {
        name: probe_from_table(name, table, where=f"{path.name}:{name}")
        for name, table in data.items()
    }


def get_probe(name: str, library: Path | None = None) -> Probe:
    """A probe by name from the packaged library or from a user's TOML file; InputError if
    unknown."""
    lib = load_probe_library(library)
    key = name.strip().lower().replace("-", "_").replace(" ", "_")
    if key not in lib:
        raise InputError(f"probe {name!r}: unknown; library probes are {', '.join(sorted(lib))}")
    return lib[key]


def load_solid_library(path: Path | None = None) -> dict[str, Solid]:
    """The solids of the packaged library (or of a user's TOML file), by name."""
    path = Path(path) if path is not None else _library_file("solids.toml")
    data = _read_toml(path)
    return {
        name: solid_from_table(name, table, where=f"{path.name}:{name}")
        for name, table in data.items()
    }


def solid_from_table(
    name: str, table: dict[str, Any], where: str = "solid", base: Solid | None = None
) -> Solid:
    """A Solid from a TOML table; fields missing from the table come from ``base``."""
    if not isinstance(table, dict):
        raise InputError(f"{where}: expected a table of solid parameters")
    base = base or Solid(name=name)
    kwargs: dict[str, Any] = {}
    for key, value in table.items():
        if key in ("sources", "name", "model"):
            continue
        if key not in ("density_nm3", "interlayer_nm", "epsilon_k", "sigma_nm", "epsilon_sf_scale"):
            raise InputError(f"{where}.{key}: unknown solid field")
        kwargs[key] = _number(where, key, value, True)
    return replace(base, name=str(table.get("name", base.name)), **kwargs)


def default_solid() -> Solid:
    """The default solid: graphite."""
    return load_solid_library()["graphite"]


# Geometry ------------------------------------------------------------------------------

SLIT = "slit"
BULK = "bulk"


@dataclass(frozen=True)
class PoreModel:
    """Everything the engine needs to know about the system, in nm and K.

    geometry: "slit" (periodic in x, y; Steele walls at z = 0 and z = H) or "bulk"
    (periodic cube). ``box_nm`` is the periodic edge (lateral edges of a slit, the cube's
    edge in bulk). ``width_nm`` is H, nucleus-to-nucleus (ignored in bulk).
    Bulk uses homogeneous long-range corrections; the slit uses a plain truncation at
    ``cutoff_nm`` (the cutoff policy: see gcmc.physics.potentials.default_cutoff_nm).
    """

    probe: Probe
    solid: Solid
    geometry: str
    cutoff_nm: float
    box_nm: float
    width_nm: float = 0.0

    @property
    def solid_fluid(self) -> SolidFluid:
        """The solid-fluid interaction parameters (Lorentz-Berthelot unless overridden)."""
        return solid_fluid_parameters(self.probe, self.solid)

    @property
    def box_lengths_nm(self) -> tuple[float, float, float]:
        """Periodic box edges (x, y, z) in nm; z is the pore width in a slit."""
        if self.geometry == BULK:
            return (self.box_nm, self.box_nm, self.box_nm)
        return (self.box_nm, self.box_nm, self.width_nm)

    @property
    def volume_nm3(self) -> float:
        """The simulation volume A*H (slit) or L^3 (bulk): the insertion volume."""
        lx, ly, lz = self.box_lengths_nm
        return lx * ly * lz

    @property
    def internal_width_nm(self) -> float:
        """w = H - sigma_ss, the default width presented to inversions (see conventions)."""
        return self.width_nm - self.solid.sigma_nm

    @property
    def pore_volume_nm3(self) -> float:
        """Pore volume for densities: A*w with w = H - sigma_ss (slit), L^3 (bulk)."""
        if self.geometry == BULK:
            return self.volume_nm3
        return self.box_nm * self.box_nm * max(self.internal_width_nm, 0.0)

    def describe(self, slab_tail: bool = True) -> dict[str, Any]:
        """The model as a plain dict (probe, solid, solid-fluid parameters, geometry, ...) for
        provenance."""
        sf = self.solid_fluid
        return {
            "probe": self.probe.name,
            "epsilon_k": self.probe.epsilon_k,
            "sigma_nm": self.probe.sigma_nm,
            "solid": self.solid.to_dict(),
            "epsilon_sf_k": sf.epsilon_k,
            "sigma_sf_nm": sf.sigma_nm,
            "geometry": self.geometry,
            "cutoff_nm": self.cutoff_nm,
            "box_nm": list(self.box_lengths_nm),
            "width_H_nm": self.width_nm if self.geometry == SLIT else None,
            "width_w_nm": self.internal_width_nm if self.geometry == SLIT else None,
            "pore_volume_nm3": self.pore_volume_nm3,
            "tail_correction": (
                "homogeneous (Allen & Tildesley)"
                if self.geometry == BULK
                else ("slab (Janecek 2006) beyond r_c" if slab_tail else "none")
            ),
        }
