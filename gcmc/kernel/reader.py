"""Read a kernel file (one HDF5 file per kernel version, schema in kernels/README.md) and
evaluate its kernel matrix.

This module imports only numpy, h5py, the standard library, :mod:`gcmc.kernel.forms`,
:mod:`gcmc.errors` and :mod:`gcmc.kernel.data`, so that a downstream inversion code can read
a kernel and evaluate it with numpy and h5py alone (no scipy, no numba).

Opening a kernel (:func:`open_kernel`) checks, in this order: that the file is readable HDF5
(a truncated or damaged file is refused with one line), that it is a kernel file, that its
schema major version is one this reader knows, and that the SHA-256 checksums stored in it
match its content (a flipped byte is refused, naming the damaged group). Everything is then
read into memory as a :class:`gcmc.kernel.data.KernelData` and the file is closed.

Evaluation (:meth:`Kernel.evaluate`): see its docstring for the policies (Henry-law extension
below the simulated range, the stored above-range policy, linear interpolation in width,
bulk density interpolated in ln p for excess amounts).
"""

from __future__ import annotations

import hashlib
import json
from collections import OrderedDict
from collections.abc import Iterable, Iterator
from dataclasses import fields as dataclass_fields
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from gcmc.errors import InputError
from gcmc.kernel import forms as _forms
from gcmc.kernel import schema as _schema
from gcmc.kernel.data import POINT_FIELDS, FitRecord, KernelData
from gcmc.kernel.eqbranch import read_equilibrium
from gcmc.kernel.heat import heat_matrix, read_heat
from gcmc.kernel.schema import (
    CHECKSUM_ATTR,
    DICT_LAYOUT_ATTR,
    FORMAT_NAME,
    SCHEMA_MAJOR,
    SCHEMA_VERSION,
)

# The schema this reader writes and understands (major.minor, gcmc.kernel.schema): a file
# with another major version is refused; a newer minor version of the same major is read
# (minor versions only add datasets or attributes).

#: HDF5 dimension-scale bookkeeping attributes: they hold object references (file addresses),
#: which change when a file is repacked. The checksum covers the attachments instead, resolved
#: to the paths of the attached scales.
_REFERENCE_ATTRS = frozenset({"DIMENSION_LIST", "REFERENCE_LIST"})

#: Tolerance for matching a requested temperature to a kernel temperature (relative).
TEMPERATURE_RTOL = 1e-9
#: Tolerance for a requested width on the edge of the kernel's width range (relative to the
#: width span): rounding in a caller's width grid must not turn an edge width into an error.
WIDTH_EDGE_RTOL = 1e-12

_CACHE_SIZE = 16


# --------------------------------------------------------------------------------------------
# canonical serialisation and checksums (shared with gcmc.kernel.writer, which writes them)
# --------------------------------------------------------------------------------------------
def _as_text(x: Any) -> str:
    if isinstance(x, bytes | np.bytes_):
        return bytes(x).decode("utf-8")
    return str(x)


def _canonical(value: Any) -> Iterator[bytes]:
    """Yield a canonical byte serialisation of an attribute or dataset value: a type tag,
    the shape and the content. Strings (fixed or variable length, bytes or str) serialise
    as length-prefixed UTF-8; numbers as little-endian bytes of their dtype; booleans as
    uint8."""
    arr = np.asarray(value)
    shape = ",".join(str(n) for n in arr.shape).encode()
    if arr.dtype.kind in "OUS":
        yield b"str|" + shape + b"|"
        for item in arr.ravel():
            b = _as_text(item).encode("utf-8")
            yield len(b).to_bytes(8, "little") + b
        return
    if arr.dtype.kind == "b":
        arr = arr.astype(np.uint8)
        tag = b"bool"
    else:
        arr = arr.astype(arr.dtype.newbyteorder("<"), copy=False)
        tag = arr.dtype.str.encode()
    data = np.ascontiguousarray(arr).tobytes()
    yield tag + b"|" + shape + b"|" + len(data).to_bytes(8, "little")
    yield data


def _field(h: Any, b: bytes) -> None:
    h.update(len(b).to_bytes(8, "little"))
    h.update(b)


def _hash_attrs(obj: h5py.HLObject, hashers: Iterable[Any]) -> None:
    hashers = list(hashers)
    for key in sorted(obj.attrs.keys()):
        if key == CHECKSUM_ATTR or key in _REFERENCE_ATTRS:
            continue
        parts = list(_canonical(obj.attrs[key]))
        for h in hashers:
            _field(h, b"A:" + key.encode("utf-8"))
            for part in parts:
                _field(h, part)


def _dataset_value(ds: h5py.Dataset) -> Any:
    if h5py.check_string_dtype(ds.dtype) is not None:
        return ds.asstr()[()]
    return ds[()]


def compute_checksums(
    f: h5py.File, values: dict[str, Any] | None = None
) -> tuple[str, dict[str, str]]:
    """SHA-256 of the whole file content and of each top-level group, in one pass.

    The serialisation visits, in sorted path order, every group and dataset: its path, its
    attributes in sorted name order (name, type, shape, bytes; every ``checksum_sha256``
    attribute and the reference-valued dimension-scale bookkeeping attributes excluded), and for
    a dataset its dtype, shape and bytes plus, per dimension, the paths of the attached scales.
    The root digest covers the root attributes and everything below; a group digest covers
    the group's subtree. Returns (root hex digest, {group path: hex digest}). If ``values``
    is a dict, the dataset values read on the way are stored in it by relative path.
    """
    root = hashlib.sha256()
    groups: dict[str, Any] = {}
    _field(root, b"schema-checksum-1")
    _hash_attrs(f, [root])
    paths: list[str] = []
    f.visit(paths.append)
    objects = {rel: f[rel] for rel in sorted(paths)}
    # attached scales are resolved to paths through their object ids (h5py's .name of a
    # dereferenced scale is a slow library call)
    scale_paths = {
        obj.id: "/" + rel
        for rel, obj in objects.items()
        if isinstance(obj, h5py.Dataset) and obj.is_scale
    }
    for rel, obj in objects.items():
        top = "/" + rel.split("/", 1)[0]
        if top not in groups:
            groups[top] = hashlib.sha256()
            _field(groups[top], b"schema-checksum-1")
        hs = [root, groups[top]]
        kind = b"D:" if isinstance(obj, h5py.Dataset) else b"G:"
        for h in hs:
            _field(h, kind + ("/" + rel).encode("utf-8"))
        _hash_attrs(obj, hs)
        if isinstance(obj, h5py.Dataset):
            value = _dataset_value(obj)
            if values is not None:
                values[rel] = value
            for part in _canonical(value):
                for h in hs:
                    _field(h, part)
            for i, dim in enumerate(obj.dims):
                scales = ",".join(scale_paths.get(s.id, "?") for s in dim.values())
                for h in hs:
                    _field(h, f"dim{i}:{scales}".encode())
    return root.hexdigest(), {k: v.hexdigest() for k, v in groups.items()}


# --------------------------------------------------------------------------------------------
# attribute dictionaries (probe, solid, EOS parameters)
# --------------------------------------------------------------------------------------------


def _py(value: Any) -> Any:
    """An HDF5 attribute value as a plain Python value."""
    if isinstance(value, bytes | np.bytes_):
        return bytes(value).decode("utf-8")
    if isinstance(value, np.ndarray):
        return [_py(v) for v in value.tolist()] if value.dtype.kind in "OSU" else value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    return value


def read_attr_dict(obj: h5py.HLObject) -> dict[str, Any]:
    """Inverse of gcmc.kernel.writer's attribute-dictionary writer: each key is an attribute; plain
    scalars (str, int, float, bool) are stored as themselves, other values (None, lists,
    nested dicts) as JSON text. The attribute ``dict_layout`` (JSON) lists the keys in order
    and which of them are JSON encoded."""
    layout = json.loads(_py(obj.attrs[DICT_LAYOUT_ATTR]))
    encoded = set(layout["json"])
    out: dict[str, Any] = {}
    for key in layout["order"]:
        value = _py(obj.attrs[key])
        out[key] = json.loads(value) if key in encoded else value
    return out


# --------------------------------------------------------------------------------------------
# opening
# --------------------------------------------------------------------------------------------
def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text[:300] if text else type(exc).__name__


def parse_schema_version(text: str, path: Path | str) -> tuple[int, int]:
    parts = str(text).split(".")
    if len(parts) != 2 or not all(p.isdigit() for p in parts):
        raise InputError(f"{path}: schema_version {text!r} is not of the form major.minor")
    return int(parts[0]), int(parts[1])


def open_kernel(path: str | Path) -> Kernel:
    """Open, verify and read a kernel file into memory. Raises InputError (one line, naming the
    file) for a missing, truncated or damaged file, an unknown schema major version, or a
    checksum mismatch."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such kernel file")
    try:
        f = h5py.File(path, "r")
    except Exception as exc:  # h5py raises OSError, but a damaged superblock can raise others
        raise InputError(
            f"{path}: not a readable HDF5 file (truncated or damaged?): {_one_line(exc)}"
        ) from None
    try:
        with f:
            return _read_open_file(f, path)
    except InputError:
        raise
    except Exception as exc:  # a damaged file can fail anywhere inside the HDF5 library
        raise InputError(f"{path}: damaged kernel file: {_one_line(exc)}") from None


def _read_open_file(f: h5py.File, path: Path) -> Kernel:
    attrs = f.attrs
    if _py(attrs.get("format", "")) != FORMAT_NAME:
        raise InputError(
            f"{path}: not a {FORMAT_NAME} file (root attribute 'format' missing or different)"
        )
    if "schema_version" not in attrs:
        raise InputError(f"{path}: root attribute 'schema_version' missing")
    schema = _py(attrs["schema_version"])
    major, minor = parse_schema_version(schema, path)
    if major != SCHEMA_MAJOR:
        raise InputError(
            f"{path}: kernel schema version {schema} is not supported: this reader knows "
            f"major version {SCHEMA_MAJOR} (schema {SCHEMA_VERSION})"
        )
    if CHECKSUM_ATTR not in attrs:
        raise InputError(f"{path}: root attribute {CHECKSUM_ATTR!r} missing: cannot verify")
    stored = _py(attrs[CHECKSUM_ATTR])
    values: dict[str, Any] = {}
    digest, group_digests = compute_checksums(f, values)
    bad = sorted(
        g
        for g, d in group_digests.items()
        if CHECKSUM_ATTR in f[g].attrs and _py(f[g].attrs[CHECKSUM_ATTR]) != d
    )
    missing = sorted(g for g in group_digests if CHECKSUM_ATTR not in f[g].attrs)
    if digest != stored or bad or missing:
        where = f" (damaged: {', '.join(bad)})" if bad else ""
        if missing:
            where += f" (groups without checksum: {', '.join(missing)})"
        raise InputError(
            f"{path}: checksum mismatch{where}: the file was modified or damaged after writing"
        )
    missing = missing_rows(f)
    if missing:
        raise InputError(
            f"{path}: not a complete kernel file: missing {', '.join(missing[:5])}"
            + (f" and {len(missing) - 5} more" if len(missing) > 5 else "")
        )
    data = _read_kernel_data(f, values)
    info = {
        "schema_version": schema,
        "checksum_sha256": stored,
        "created": _py(attrs.get("created", "")),
        "config_hash": _py(attrs.get("config_hash", "")),
        "code_version": _py(attrs.get("code_version", "")),
    }
    return Kernel(data, path=path, info=info)


def _read_value(f: h5py.File, name: str, values: dict[str, Any] | None = None) -> np.ndarray:
    if values is not None and name in values:
        value = values[name]
    else:
        value = _dataset_value(f[name])
    a = np.asarray(value)
    return a.astype(str) if a.dtype.kind in "OS" else a.copy()


def _read_kernel_data(f: h5py.File, values: dict[str, Any] | None = None) -> KernelData:
    def _read(f: h5py.File, name: str) -> np.ndarray:
        return _read_value(f, name, values)

    points: dict[str, dict[str, np.ndarray]] = {}
    flags: dict[str, np.ndarray] = {}
    branches = _py(f["points"].attrs["branches"])
    for branch in branches:
        g = f["points"][branch]
        order = _py(g.attrs["field_order"])
        points[branch] = {name: _read(f, f"points/{branch}/{name}") for name in order}
        flags[branch] = _read(f, f"points/{branch}/flags")

    density = points["adsorption"]["density_per_nm3"]
    grid = _read(f, "axes/pressure_Pa")
    form_names = _read(f, "fits/form")
    n_par = _read(f, "fits/n_parameters")
    params = _read(f, "fits/parameters")
    cov = _read(f, "fits/covariance")
    n_res = _read(f, "fits/n_residuals")
    residuals = _read(f, "fits/residuals")
    scalars = {k: _read(f, f"fits/{k}") for k in ("chi2", "reduced_chi2", "p_value", "aicc")}
    dof = _read(f, "fits/dof")
    accepted = _read(f, "fits/accepted")
    n_t, n_w = form_names.shape
    fits: list[list[FitRecord]] = []
    for t in range(n_t):
        row = []
        for w in range(n_w):
            k = int(n_par[t, w])
            m = int(n_res[t, w])
            res = residuals[t, w]
            if m != res.size:  # the fit's residuals were given at the simulated points only
                res = res[np.isfinite(density[t, w]) & np.isfinite(grid[t])]
            row.append(
                FitRecord(
                    form=str(form_names[t, w]),
                    parameters=params[t, w, :k].copy(),
                    covariance=cov[t, w, :k, :k].copy(),
                    chi2=float(scalars["chi2"][t, w]),
                    dof=int(dof[t, w]),
                    reduced_chi2=float(scalars["reduced_chi2"][t, w]),
                    p_value=float(scalars["p_value"][t, w]),
                    aicc=float(scalars["aicc"][t, w]),
                    residuals=np.array(res, dtype=float),
                    accepted=bool(accepted[t, w]),
                )
            )
        fits.append(row)

    extra: dict[str, np.ndarray] = {}
    if "extra" in f:
        xg = f["extra"]
        order = json.loads(_py(xg.attrs["order"])) if "order" in xg.attrs else sorted(xg)
        extra = {name: _read(f, f"extra/{name}") for name in order}
    fields: dict[str, Any] = {}
    for e in _schema.SCHEMA:  # the rows that hold a KernelData field, as the table says
        if e.field is None:
            continue
        if e.kind == "attr":
            fields[e.field] = _attr_value(e, (f[e.group] if e.group else f).attrs[e.name])
        elif e.kind == "attrdict":
            fields[e.field] = read_attr_dict(f[e.path])
        elif e.kind == "text":
            text = str(_read(f, e.path))
            fields[e.field] = json.loads(text) if e.dtype == "json" else text
        else:
            value = _read(f, e.path)
            fields[e.field] = value.astype(bool) if e.dtype == "bool" else value
    heat = read_heat(f, values)
    equilibrium = read_equilibrium(f, values)
    return KernelData(
        points=points,
        flags=flags,
        fits=fits,
        extra=extra,
        heat=heat,
        equilibrium=equilibrium,
        **fields,
    )


def _attr_value(e: _schema.Entry, value: Any) -> Any:
    """An attribute of the row ``e`` as the KernelData field's Python type."""
    value = _py(value)
    if e.dtype == "float64":
        return float(value)
    if e.dtype == "int64":
        return int(value)
    return value


def missing_rows(f: h5py.File) -> list[str]:
    """The required rows of the schema (gcmc.kernel.schema) absent from an open file."""
    out = []
    branches = (
        _py(f["points"].attrs["branches"])
        if "points" in f and "branches" in f["points"].attrs
        else []
    )
    for e in _schema.SCHEMA:
        if not e.required:
            continue
        for path in [e.at(b) for b in branches] if "<branch>" in e.group else [e.path]:
            group, _, name = path.rpartition("@") if e.is_attr else path.rpartition("/")
            if e.is_attr:
                obj = f.get(group) if group else f
                ok = obj is not None and name in obj.attrs
            else:
                ok = path in f
            if not ok:
                out.append("/" + path)
    return out


# --------------------------------------------------------------------------------------------
# the kernel
# --------------------------------------------------------------------------------------------
class Kernel:
    """A verified kernel in memory. ``data`` is the full :class:`KernelData`."""

    def __init__(self, data: KernelData, path: Path | None = None, info: dict | None = None):
        self.data = data
        self.path = path
        self.info = dict(info or {})
        self._label = str(path) if path is not None else f"kernel {data.name!r}"
        self._cache: OrderedDict[tuple[int, bytes], tuple[np.ndarray, np.ndarray]] = OrderedDict()
        self._ranges = simulated_ranges(data)  # (T, W, 2) p_low, p_high in Pa

    # ---- identity and axes ----------------------------------------------------------------
    @property
    def name(self) -> str:
        """Kernel name."""
        return self.data.name

    @property
    def version(self) -> int:
        """Kernel version."""
        return int(self.data.version)

    @property
    def schema_version(self) -> str:
        """Schema version of the file (``major.minor``)."""
        return str(self.info.get("schema_version", SCHEMA_VERSION))

    @property
    def temperatures_K(self) -> np.ndarray:
        """Kernel temperatures (K), a copy."""
        return np.array(self.data.temperatures_K, dtype=float)

    @property
    def widths_H_nm(self) -> np.ndarray:
        """Kernel widths H, nucleus to nucleus (nm), a copy."""
        return np.array(self.data.widths_H_nm, dtype=float)

    @property
    def widths_w_nm(self) -> np.ndarray:
        """Kernel widths w, as presented to inversions (nm), a copy."""
        return np.array(self.data.widths_w_nm, dtype=float)

    def temperature_index(self, temperature: float | int | np.integer) -> int:
        """Index of a kernel temperature given as an index (int) or a value in K (float,
        matched within 1e-9 relative)."""
        temps = np.asarray(self.data.temperatures_K, dtype=float)
        if isinstance(temperature, int | np.integer) and not isinstance(temperature, bool):
            i = int(temperature)
            if not 0 <= i < temps.size:
                raise InputError(f"temperature index: {i} outside 0..{temps.size - 1}")
            return i
        try:
            value = float(temperature)
        except (TypeError, ValueError):
            raise InputError(f"temperature: not a number: {temperature!r}") from None
        hit = np.flatnonzero(np.abs(temps - value) <= TEMPERATURE_RTOL * np.abs(temps))
        if hit.size == 0:
            known = ", ".join(f"{x:g}" for x in temps)
            raise InputError(
                f"temperature: {value:g} K is not a temperature of {self._label} (it has {known} K)"
            )
        return int(hit[0])

    def pressures_Pa(self, temperature: float | int | np.integer) -> np.ndarray:
        """The simulated pressure grid (Pa) at a kernel temperature (index or value in K)."""
        row = np.asarray(self.data.pressures_Pa[self.temperature_index(temperature)], float)
        return row[np.isfinite(row)].copy()

    # ---- evaluation -----------------------------------------------------------------------
    def evaluate(
        self,
        pressures_Pa: Iterable[float] | np.ndarray,
        widths_nm: Iterable[float] | np.ndarray,
        temperature_K: float,
        width_axis: str = "w",
        quantity: str = "absolute",
    ) -> np.ndarray:
        """Kernel matrix: density (molecules/nm^3 of pore volume, the volume of the stored
        pore-volume convention) of shape (len(pressures), len(widths)).

        At each kernel width the stored adsorption-branch fit is evaluated
        (gcmc.kernel.forms.evaluate_fit with the form name and parameters; ``monotone_interpolant``
        where the fit says so; ``zero`` for a pore too narrow for the probe):
        * below the lowest simulated pressure of that pore: the Henry-law extension
          (gcmc.kernel.forms.henry_extension) with the stored exact Henry constant;
        * above the highest simulated pressure: the stored ``above_range`` policy ("clamp":
          the value at the highest pressure; "refuse": NaN).
        Between kernel widths the density is interpolated linearly in width (on the axis
        ``width_axis``: "w" the width presented to inversions, "H" the nucleus-to-nucleus
        width); a width outside the kernel's range is an InputError.

        ``quantity="excess"``: absolute minus the bulk density of the kernel's equation of
        state at the same pressure, interpolated from the stored bulk densities linearly in
        (ln p, ln rho), i.e. a power law between stored pressures; below the lowest stored
        pressure rho is proportional to p (the ideal-gas limit); above the highest, the
        ``above_range`` policy (clamp: hold rho at the highest pressure; refuse: NaN).
        """
        if width_axis not in ("w", "H"):
            raise InputError(f"width_axis: must be 'w' or 'H', got {width_axis!r}")
        if quantity not in ("absolute", "excess"):
            raise InputError(f"quantity: must be 'absolute' or 'excess', got {quantity!r}")
        p = np.asarray(pressures_Pa, dtype=float)
        x = np.asarray(widths_nm, dtype=float)
        if p.ndim != 1 or x.ndim != 1:
            raise InputError("pressures_Pa and widths_nm: must be 1-D sequences")
        if not np.all(np.isfinite(p)) or np.any(p < 0.0):
            raise InputError("pressures_Pa: must be finite and >= 0")
        if not np.all(np.isfinite(x)):
            raise InputError("widths_nm: must be finite")
        t = self.temperature_index(float(temperature_K))
        axis = np.asarray(
            self.data.widths_w_nm if width_axis == "w" else self.data.widths_H_nm, dtype=float
        )
        lo_i, hi_i, frac = _width_weights(axis, x, width_axis, self._label)
        needed = np.unique(np.concatenate([lo_i, hi_i]))
        cols = self._columns(t, p, needed)  # (W, P), rows filled for `needed`
        out = (cols[lo_i] * (1.0 - frac)[:, None] + cols[hi_i] * frac[:, None]).T
        if quantity == "excess":
            out = out - self.bulk_density(p, t)[:, None]
        return out

    kernel_matrix = evaluate

    # ---- equilibrium branch (schema 1.1, optional) ------------------------------------------
    @property
    def has_equilibrium(self) -> bool:
        """True when the file stores the equilibrium branch (group ``equilibrium``)."""
        return self.data.equilibrium is not None

    def equilibrium_branch(
        self, temperature: float | int | np.integer
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The equilibrium density branch at a kernel temperature (index or K): (pressures
        (P,) Pa, density (W, P) nm^-3, standard error (W, P)), on the simulated grid
        (adsorption below each pore's f_eq, desorption above; the adsorption branch where a
        pore has no loop; NaN where a loop has no located transition). InputError when the
        kernel has none."""
        eq = self.data.equilibrium
        if eq is None:
            raise InputError(f"{self._label}: no equilibrium branch (built without [equilibrium])")
        t = self.temperature_index(temperature)
        p = np.asarray(self.data.pressures_Pa[t], float).copy()
        return p, np.array(eq.density_per_nm3[t], float), np.array(eq.density_per_nm3_stderr[t])

    def equilibrium_transitions(
        self, temperature: float | int | np.integer
    ) -> tuple[np.ndarray, np.ndarray]:
        """(p_eq, its uncertainty) in Pa per width at a kernel temperature (NaN where a pore
        has no located transition). InputError when the kernel has none."""
        eq = self.data.equilibrium
        if eq is None:
            raise InputError(f"{self._label}: no equilibrium branch (built without [equilibrium])")
        t = self.temperature_index(temperature)
        return np.array(eq.pressure_Pa[t], float), np.array(eq.pressure_uncertainty_Pa[t], float)

    def isosteric_heat(
        self,
        pressures_Pa: Iterable[float] | np.ndarray,
        widths_nm: Iterable[float] | np.ndarray,
        temperature_K: float,
        width_axis: str = "w",
    ) -> tuple[np.ndarray, np.ndarray]:
        """The isosteric-heat kernel q_st (kJ/mol) and its standard errors, each of shape
        (len(pressures), len(widths)); see gcmc.kernel.heat. InputError if the file has none."""
        return heat_matrix(
            self,
            np.asarray(pressures_Pa, float),
            np.asarray(widths_nm, float),
            temperature_K,
            width_axis,
        )

    def bulk_density(self, pressures_Pa: np.ndarray, temperature: float | int) -> np.ndarray:
        """Bulk density (molecules/nm^3) of the kernel's EOS at pressures (Pa), interpolated
        from the stored values as described in :meth:`evaluate`."""
        t = self.temperature_index(temperature)
        p = np.asarray(pressures_Pa, dtype=float)
        grid = np.asarray(self.data.pressures_Pa[t], dtype=float)
        rho = np.asarray(self.data.bulk_density_per_nm3[t], dtype=float)
        ok = np.isfinite(grid) & np.isfinite(rho) & (grid > 0.0) & (rho > 0.0)
        if not np.any(ok):
            raise InputError(f"{self._label}: no stored bulk densities at T index {t}")
        g, r = grid[ok], rho[ok]
        order = np.argsort(g)
        g, r = g[order], r[order]
        with np.errstate(divide="ignore"):
            lp = np.log(np.where(p > 0.0, p, 1.0))
        out = np.exp(np.interp(lp, np.log(g), np.log(r)))
        out = np.where(p < g[0], r[0] * p / g[0], out)
        if self.data.above_range == "refuse":
            out = np.where(p > g[-1], np.nan, out)
        else:
            out = np.where(p > g[-1], r[-1], out)
        return out

    def _columns(self, t: int, p: np.ndarray, needed: np.ndarray) -> np.ndarray:
        key = (t, p.tobytes())
        entry = self._cache.get(key)
        if entry is None:
            n_w = len(self.data.widths_H_nm)
            entry = (np.full((n_w, p.size), np.nan), np.zeros(n_w, dtype=bool))
            self._cache[key] = entry
            while len(self._cache) > _CACHE_SIZE:
                self._cache.popitem(last=False)
        else:
            self._cache.move_to_end(key)
        cols, done = entry
        for j in needed[~done[needed]]:
            cols[j] = self._evaluate_width(t, int(j), p)
            done[j] = True
        return cols

    def _evaluate_width(self, t: int, j: int, p: np.ndarray) -> np.ndarray:
        rec = self.data.fits[t][j]
        if rec.form == _forms.ZERO_FORM:
            return np.zeros(p.shape)
        p_low, p_high = self._ranges[t, j]
        if rec.form == _forms.INTERPOLANT_FORM:
            p_low = p_high = None  # the knots are the simulated points
        elif not (np.isfinite(p_low) and np.isfinite(p_high)):
            raise InputError(
                f"{self._label}: no simulated points for H = {self.data.widths_H_nm[j]:g} nm "
                f"at T = {self.data.temperatures_K[t]:g} K"
            )
        try:
            return _forms.evaluate_fit(
                rec.form,
                rec.parameters,
                p,
                p_low=p_low,
                p_high=p_high,
                above=self.data.above_range,
                below="henry",
                henry_constant=float(self.data.henry_per_nm3_per_pa[t, j]),
            )
        except InputError as exc:
            raise InputError(
                f"{self._label}: fit at T = {self.data.temperatures_K[t]:g} K, "
                f"H = {self.data.widths_H_nm[j]:g} nm: {exc}"
            ) from None

    def __repr__(self) -> str:
        return (
            f"Kernel({self.name!r}, v{self.version}, T={len(self.data.temperatures_K)}, "
            f"W={len(self.data.widths_H_nm)}, schema {self.schema_version})"
        )


def _width_weights(
    axis: np.ndarray, x: np.ndarray, axis_name: str, label: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bracketing kernel-width indices and linear weights for the requested widths."""
    n = axis.size
    span = float(axis[-1] - axis[0]) if n > 1 else max(abs(float(axis[0])), 1.0)
    tol = WIDTH_EDGE_RTOL * span
    outside = (x < axis[0] - tol) | (x > axis[-1] + tol)
    if np.any(outside):
        bad = x[outside][0]
        raise InputError(
            f"widths_nm: {bad:g} nm is outside the kernel's {axis_name} range "
            f"[{axis[0]:g}, {axis[-1]:g}] nm ({label})"
        )
    if n == 1:
        z = np.zeros(x.size, dtype=int)
        return z, z, np.zeros(x.size)
    xc = np.clip(x, axis[0], axis[-1])
    lo = np.clip(np.searchsorted(axis, xc, side="right") - 1, 0, n - 2)
    hi = lo + 1
    frac = (xc - axis[lo]) / (axis[hi] - axis[lo])
    return lo, hi, frac


def simulated_ranges(data: KernelData) -> np.ndarray:
    """(T, W, 2): lowest and highest pressure (Pa) at which the adsorption branch of each pore
    was simulated (a finite density), NaN where none was. The evaluation policies apply
    outside this range."""
    p = np.asarray(data.pressures_Pa, dtype=float)
    n = np.asarray(data.points["adsorption"]["density_per_nm3"], dtype=float)
    ok = np.isfinite(n) & np.isfinite(p)[:, None, :] & (p[:, None, :] > 0.0)
    pp = np.broadcast_to(p[:, None, :], n.shape)
    with np.errstate(invalid="ignore"):
        lo = np.where(ok, pp, np.inf).min(axis=2)
        hi = np.where(ok, pp, -np.inf).max(axis=2)
    lo[~np.isfinite(lo)] = np.nan
    hi[~np.isfinite(hi)] = np.nan
    return np.stack([lo, hi], axis=-1)


def kernel_matrix(
    kernel: Kernel | str | Path,
    pressures_Pa: np.ndarray,
    widths_nm: np.ndarray,
    temperature_K: float,
    width_axis: str = "w",
    quantity: str = "absolute",
) -> np.ndarray:
    """Module-level form of :meth:`Kernel.evaluate` (opens the file if given a path)."""
    k = kernel if isinstance(kernel, Kernel) else open_kernel(kernel)
    return k.evaluate(pressures_Pa, widths_nm, temperature_K, width_axis, quantity)


def kernel_data_fields() -> tuple[str, ...]:
    """The KernelData field names (for tests and tools comparing round trips)."""
    return tuple(f.name for f in dataclass_fields(KernelData))


__all__ = [
    "FORMAT_NAME",
    "POINT_FIELDS",
    "SCHEMA_VERSION",
    "Kernel",
    "compute_checksums",
    "kernel_matrix",
    "open_kernel",
    "simulated_ranges",
]
