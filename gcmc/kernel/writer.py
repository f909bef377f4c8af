"""The kernel library writer: one HDF5 file per kernel version, ``<name>.v<version>.h5``.

The layout (schema 1.1) is documented in kernels/README.md; :mod:`gcmc.reader` reads it back.
The rows written and their order come from the schema table (:mod:`gcmc.kernel.schema`).
Files are never overwritten and never left half-written: a kernel is written to a temporary
file in the target folder, checksummed, read back and verified, fsynced, and only then given
its final name (:func:`gcmc.files.publish`: a hard link, which fails if the name exists, or
``os.replace`` where the file system has no hard links). On any failure the temporary file is
removed.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import re
import socket
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from gcmc import __version__
from gcmc.errors import InputError
from gcmc.files import atomic_path
from gcmc.kernel import forms as _forms
from gcmc.kernel import schema as _schema
from gcmc.kernel.data import POINT_FIELDS, FitRecord, KernelData
from gcmc.kernel.eqbranch import EQ_GROUP, validate_equilibrium, write_equilibrium
from gcmc.kernel.heat import HEAT_GROUP, validate_heat, write_heat
from gcmc.kernel.reader import compute_checksums, open_kernel, simulated_ranges
from gcmc.kernel.schema import CHECKSUM_ATTR, DICT_LAYOUT_ATTR, FORMAT_NAME

#: Kernel names: used in file names, so letters, digits and ``_ . + -`` only.
NAME_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.+-]*$")
_KEY_PATTERN = re.compile(r"^[A-Za-z0-9_][A-Za-z0-9_.+-]*$")
_FILE_PATTERN = re.compile(r"^(?P<name>.+)\.v(?P<version>[0-9]+)\.h5$")

#: HDF5 file-format bounds: readable by HDF5 >= 1.10 (h5py >= 2.10); object headers and
#: B-trees of this format carry their own checksums, so damaged metadata is detected too.
LIBVER = ("v110", "v110")

_VALID_BRANCHES = re.compile(r"^[a-z][a-z0-9_]*$")


# --------------------------------------------------------------------------------------------
# names, versions, config hashes
# --------------------------------------------------------------------------------------------
def config_hash(config_text: str) -> str:
    """SHA-256 (hex) of the config text as UTF-8: the identity of a build configuration when
    the provenance does not give its own ``config_hash``."""
    return hashlib.sha256(config_text.encode("utf-8")).hexdigest()


def kernel_config_hash(data: KernelData) -> str:
    """The config hash a kernel is filed under: ``provenance["config_hash"]`` if given, else
    :func:`config_hash` of the config text."""
    given = data.provenance.get("config_hash") if isinstance(data.provenance, dict) else None
    return str(given) if given else config_hash(data.config_text)


def _check_name(name: object) -> str:
    if not isinstance(name, str) or not NAME_PATTERN.match(name):
        raise InputError(
            f"name: kernel name {name!r} must start with a letter or digit and contain only "
            "letters, digits and _ . + -"
        )
    return name


def _check_version(version: object) -> int:
    if isinstance(version, bool) or not isinstance(version, int | np.integer) or version < 1:
        raise InputError(f"version: must be an integer >= 1, got {version!r}")
    return int(version)


def kernel_path(folder: str | Path, name: str, version: int) -> Path:
    """Path of a kernel version in a folder: ``<folder>/<name>.v<version>.h5``."""
    return Path(folder) / f"{_check_name(name)}.v{_check_version(version)}.h5"


def list_versions(folder: str | Path, name: str) -> dict[int, Path]:
    """The versions of a kernel present in a folder: {version: path}."""
    _check_name(name)
    folder = Path(folder)
    found: dict[int, Path] = {}
    if not folder.is_dir():
        return found
    for entry in folder.iterdir():
        m = _FILE_PATTERN.match(entry.name)
        if m and m.group("name") == name and entry.is_file():
            found[int(m.group("version"))] = entry
    return dict(sorted(found.items()))


def next_version(folder: str | Path, name: str, config_hash: str) -> tuple[int, Path | None]:
    """(version, path) for a build of kernel ``name`` with this config hash.

    If a version with the same config hash (root attribute ``config_hash``) exists, return it
    and its path: a rerun of the same config reuses it (it must verify; a damaged file with
    the same config is an InputError rather than silently rebuilt). Otherwise return
    (1 + the highest version present, or 1) and None. A file that cannot be read still
    occupies its version number: versions are never reused or overwritten.
    """
    if not isinstance(config_hash, str) or not config_hash:
        raise InputError("config_hash: must be a non-empty string")
    versions = list_versions(folder, name)
    for version, path in versions.items():
        try:
            with h5py.File(path, "r") as f:
                stored = f.attrs.get("config_hash")
        except Exception:  # unreadable: counts as used, cannot be a match
            continue
        if isinstance(stored, bytes | np.bytes_):
            stored = bytes(stored).decode("utf-8")
        if stored == config_hash:
            try:
                open_kernel(path)
            except InputError as exc:
                raise InputError(
                    f"{path}: has the same config hash but fails verification ({exc}); "
                    "move it away to rebuild"
                ) from None
            return version, path
    return (max(versions) + 1 if versions else 1), None


# --------------------------------------------------------------------------------------------
# validation
# --------------------------------------------------------------------------------------------
def _arr(value: Any, name: str, shape: tuple[int, ...], kind: str = "f") -> np.ndarray:
    try:
        if kind == "f":
            a = np.asarray(value, dtype=float)
        elif kind == "b":
            a = np.asarray(value)
            if a.dtype.kind not in "biu":
                raise InputError(f"{name}: must be boolean, got dtype {a.dtype}")
            a = a.astype(bool)
        elif kind == "s":
            a = np.asarray(value)
            if a.dtype.kind not in "OUS":
                raise InputError(f"{name}: must be an array of strings, got dtype {a.dtype}")
        else:
            a = np.asarray(value)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name}: not an array of the expected type ({exc})") from None
    if a.shape != shape:
        raise InputError(f"{name}: shape {a.shape}, expected {shape}")
    return a


def _check_dict(d: object, name: str) -> dict[str, Any]:
    if not isinstance(d, dict):
        raise InputError(f"{name}: must be a dict, got {type(d).__name__}")
    for key in d:
        if not isinstance(key, str) or not _KEY_PATTERN.match(key) or key == DICT_LAYOUT_ATTR:
            raise InputError(f"{name}: key {key!r} is not a valid attribute name")
        if key == CHECKSUM_ATTR:
            raise InputError(f"{name}: key {key!r} is reserved")
    try:
        json.dumps(d, default=_json_default)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name}: not JSON serialisable ({exc})") from None
    return d


def _json_default(o: object) -> object:
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"{type(o).__name__} is not JSON serialisable")


def _increasing(a: np.ndarray, name: str, positive: bool = True) -> None:
    if not np.all(np.isfinite(a)) or (positive and np.any(a <= 0.0)):
        raise InputError(f"{name}: must be finite{' and > 0' if positive else ''}")
    if np.any(np.diff(a) <= 0.0):
        raise InputError(f"{name}: must be strictly increasing")


def _check_fit(rec: object, t: int, w: int, n_p: int, n_finite: int, henry: float) -> None:
    where = f"fits[{t}][{w}]"
    if not isinstance(rec, FitRecord):
        raise InputError(f"{where}: must be a FitRecord, got {type(rec).__name__}")
    par = np.asarray(rec.parameters, dtype=float)
    if par.ndim != 1:
        raise InputError(f"{where}.parameters: must be 1-D")
    if rec.form == _forms.ZERO_FORM:
        if par.size:
            raise InputError(f"{where}.parameters: the 'zero' form takes no parameters")
    elif rec.form == _forms.INTERPOLANT_FORM:
        try:
            _forms.unpack_interpolant(par)
        except InputError as exc:
            raise InputError(f"{where}: {exc}") from None
    else:
        try:
            _forms.form(rec.form).check_parameters(par)
        except InputError as exc:
            raise InputError(f"{where}: {exc}") from None
    cov = np.asarray(rec.covariance, dtype=float)
    if cov.shape != (par.size, par.size):
        raise InputError(f"{where}.covariance: shape {cov.shape}, expected {(par.size,) * 2}")
    res = np.asarray(rec.residuals, dtype=float)
    if res.ndim != 1 or res.size not in (n_p, n_finite):
        raise InputError(
            f"{where}.residuals: length {res.size}, expected {n_p} (one per pressure) or "
            f"{n_finite} (one per simulated point)"
        )
    for attr in ("chi2", "reduced_chi2", "p_value", "aicc"):
        try:
            float(getattr(rec, attr))
        except (TypeError, ValueError):
            raise InputError(f"{where}.{attr}: must be a number") from None
    if rec.form != _forms.ZERO_FORM:
        if n_finite == 0:
            raise InputError(f"{where}: form {rec.form!r} but no simulated adsorption points")
        if not (np.isfinite(henry) and henry > 0.0):
            raise InputError(
                f"henry_per_nm3_per_pa[{t}, {w}]: must be finite and > 0 for a pore with a "
                f"non-zero fit, got {henry}"
            )


def validate(data: KernelData) -> None:
    """Check a KernelData for everything the file layout and the reader rely on; raise
    InputError naming the first offending field."""
    if not isinstance(data, KernelData):
        raise InputError(f"data: must be a KernelData, got {type(data).__name__}")
    _check_name(data.name)
    _check_version(data.version)
    temps = np.asarray(data.temperatures_K, dtype=float)
    if temps.ndim != 1 or temps.size == 0:
        raise InputError("temperatures_K: must be a non-empty 1-D array")
    _increasing(temps, "temperatures_K")
    h = np.asarray(data.widths_H_nm, dtype=float)
    if h.ndim != 1 or h.size == 0:
        raise InputError("widths_H_nm: must be a non-empty 1-D array")
    _increasing(h, "widths_H_nm")
    n_t, n_w = temps.size, h.size
    _increasing(_arr(data.widths_w_nm, "widths_w_nm", (n_w,)), "widths_w_nm", positive=False)
    p = np.asarray(data.pressures_Pa, dtype=float)
    if p.ndim != 2 or p.shape[0] != n_t or p.shape[1] == 0:
        raise InputError(f"pressures_Pa: shape {p.shape}, expected ({n_t}, P) with P >= 1")
    n_p = p.shape[1]
    for t in range(n_t):
        row = p[t][np.isfinite(p[t])]
        if row.size == 0:
            raise InputError(f"pressures_Pa[{t}]: no finite pressure")
        _increasing(row, f"pressures_Pa[{t}]")
    for name in ("relative_pressures", "fugacities_Pa", "bulk_density_per_nm3"):
        _arr(getattr(data, name), name, (n_t, n_p))
    _arr(data.saturation_pressures_Pa, "saturation_pressures_Pa", (n_t,))
    for name in ("probe", "solid", "eos_parameters"):
        _check_dict(getattr(data, name), name)
    if not isinstance(data.provenance, dict):
        raise InputError("provenance: must be a dict")
    try:
        json.dumps(data.provenance, default=_json_default)
    except (TypeError, ValueError) as exc:
        raise InputError(f"provenance: not JSON serialisable ({exc})") from None
    for name in ("cutoff_nm", "box_nm"):
        value = getattr(data, name)
        if not (isinstance(value, int | float | np.floating) and np.isfinite(value)):
            raise InputError(f"{name}: must be a finite number, got {value!r}")
    for name in (
        "tail_correction",
        "eos",
        "width_convention",
        "pore_volume_convention",
        "sampler",
        "config_text",
    ):
        if not isinstance(getattr(data, name), str):
            raise InputError(f"{name}: must be a string")
    if data.above_range not in ("clamp", "refuse"):
        raise InputError(f"above_range: must be 'clamp' or 'refuse', got {data.above_range!r}")

    shape3 = (n_t, n_w, n_p)
    if not isinstance(data.points, dict) or "adsorption" not in data.points:
        raise InputError("points: must be a dict with at least the 'adsorption' branch")
    for branch, fields in data.points.items():
        if not isinstance(branch, str) or not _VALID_BRANCHES.match(branch):
            raise InputError(f"points: branch name {branch!r} is not valid")
        if not isinstance(fields, dict):
            raise InputError(f"points[{branch!r}]: must be a dict field -> array")
        for fname, arr in fields.items():
            if fname not in POINT_FIELDS:
                raise InputError(
                    f"points[{branch!r}][{fname!r}]: not a known point field "
                    "(gcmc.kernel.data.POINT_FIELDS); put other data under extra"
                )
            kind = "b" if POINT_FIELDS[fname] == "bool" else "f"
            _arr(arr, f"points[{branch!r}][{fname!r}]", shape3, kind)
    if "density_per_nm3" not in data.points["adsorption"]:
        raise InputError("points['adsorption']: the field 'density_per_nm3' is required")
    if not isinstance(data.flags, dict) or set(data.flags) != set(data.points):
        raise InputError(f"flags: must have exactly the branches of points {sorted(data.points)}")
    for branch, arr in data.flags.items():
        _arr(arr, f"flags[{branch!r}]", shape3, "s")

    henry = _arr(data.henry_per_nm3_per_pa, "henry_per_nm3_per_pa", (n_t, n_w))
    _arr(data.accessible, "accessible", (n_t, n_w), "b")
    density = np.asarray(data.points["adsorption"]["density_per_nm3"], dtype=float)
    if not isinstance(data.fits, list | tuple) or len(data.fits) != n_t:
        raise InputError(f"fits: must be a list of {n_t} lists (one per temperature)")
    for t, row in enumerate(data.fits):
        if not isinstance(row, list | tuple) or len(row) != n_w:
            raise InputError(f"fits[{t}]: must be a list of {n_w} FitRecords (one per width)")
        for w, rec in enumerate(row):
            n_finite = int(np.count_nonzero(np.isfinite(density[t, w]) & np.isfinite(p[t])))
            _check_fit(rec, t, w, n_p, n_finite, float(henry[t, w]))

    dp = np.asarray(data.dense_pressures_Pa, dtype=float)
    if dp.ndim != 2 or dp.shape[0] != n_t:
        raise InputError(f"dense_pressures_Pa: shape {dp.shape}, expected ({n_t}, D)")
    _arr(data.dense_density_per_nm3, "dense_density_per_nm3", (n_t, n_w, dp.shape[1]))
    seeds = np.asarray(data.task_seeds)
    if seeds.shape[:2] != (n_t, n_w) or seeds.dtype.kind not in "iu":
        raise InputError(f"task_seeds: integer array of shape ({n_t}, {n_w}, ...) expected")
    if seeds.dtype.kind == "i" and np.any(seeds < 0):
        raise InputError("task_seeds: must be >= 0 (uint64 entropy words)")
    _arr(data.task_seconds, "task_seconds", (n_t, n_w))
    if data.heat is not None:
        validate_heat(data.heat, n_t, n_w)
    if data.equilibrium is not None:
        validate_equilibrium(data.equilibrium, n_t, n_w, n_p)
    if not isinstance(data.extra, dict):
        raise InputError("extra: must be a dict name -> array")
    for key, value in data.extra.items():
        if not isinstance(key, str) or not _KEY_PATTERN.match(key):
            raise InputError(f"extra: name {key!r} is not a valid dataset name")
        a = np.asarray(value)
        if a.dtype.kind not in "biufOUS":
            raise InputError(f"extra[{key!r}]: unsupported dtype {a.dtype}")


# --------------------------------------------------------------------------------------------
# low-level writers
# --------------------------------------------------------------------------------------------
def _dataset(
    g: h5py.Group,
    name: str,
    value: Any,
    units: str | None = None,
    dims: list[list[h5py.Dataset]] | None = None,
    labels: list[str] | None = None,
    description: str | None = None,
) -> h5py.Dataset:
    a = np.asarray(value)
    if a.dtype.kind in "OUS":
        ds = g.create_dataset(
            name,
            data=np.vectorize(str, otypes=[object])(a) if a.size else a.astype(object),
            dtype=h5py.string_dtype(),
        )
    elif a.dtype.kind == "b":
        ds = g.create_dataset(name, data=a.astype(bool), **_storage(a))
    else:
        ds = g.create_dataset(name, data=a, **_storage(a))
    if units is not None:
        ds.attrs["units"] = units
    if description is not None:
        ds.attrs["description"] = description
    if dims is not None:
        for i, scales in enumerate(dims):
            for scale in scales:
                ds.dims[i].attach_scale(scale)
    if labels is not None:
        for i, label in enumerate(labels):
            ds.dims[i].label = label
    return ds


#: Numeric datasets of at least this many bytes are stored chunked with the deflate filter
#: (available in every HDF5 build), e.g. the NaN-padded fit covariances; smaller ones are
#: contiguous.
COMPRESS_BYTES = 64 * 1024


def _storage(a: np.ndarray) -> dict[str, Any]:
    if a.nbytes < COMPRESS_BYTES or a.ndim == 0 or 0 in a.shape:
        return {}
    return {"compression": "gzip", "compression_opts": 4, "shuffle": True, "chunks": True}


def _text(g: h5py.Group, name: str, text: str) -> h5py.Dataset:
    return g.create_dataset(name, data=text, dtype=h5py.string_dtype())


def _write_attr_dict(g: h5py.Group, d: dict[str, Any]) -> None:
    encoded = []
    for key, value in d.items():
        if isinstance(value, np.generic):
            value = value.item()
        if isinstance(value, str | bool | float) or (
            isinstance(value, int) and -(2**63) <= value < 2**63
        ):
            g.attrs[key] = value
        else:
            g.attrs[key] = json.dumps(value, default=_json_default, sort_keys=True)
            encoded.append(key)
    g.attrs[DICT_LAYOUT_ATTR] = json.dumps({"order": list(d), "json": encoded})


def _utc_now() -> str:
    return _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat()


def _fit_arrays(data: KernelData) -> dict[str, Any]:
    """The /fits datasets: the FitRecords packed into (T, W[, ...]) arrays, NaN-padded."""
    n_t, n_w = len(data.temperatures_K), len(data.widths_H_nm)
    pressures = np.asarray(data.pressures_Pa, dtype=float)
    n_p = pressures.shape[1]
    k_max = max([np.asarray(r.parameters).size for row in data.fits for r in row] + [0])
    forms = np.empty((n_t, n_w), dtype=object)
    n_par = np.zeros((n_t, n_w), dtype=np.int32)
    n_res = np.zeros((n_t, n_w), dtype=np.int32)
    params = np.full((n_t, n_w, k_max), np.nan)
    cov = np.full((n_t, n_w, k_max, k_max), np.nan)
    residuals = np.full((n_t, n_w, n_p), np.nan)
    scal = {k: np.full((n_t, n_w), np.nan) for k in ("chi2", "reduced_chi2", "p_value", "aicc")}
    dof = np.zeros((n_t, n_w), dtype=np.int64)
    accepted = np.zeros((n_t, n_w), dtype=bool)
    density = np.asarray(data.points["adsorption"]["density_per_nm3"], float)
    for t, row in enumerate(data.fits):
        for w, rec in enumerate(row):
            par = np.asarray(rec.parameters, float)
            k = par.size
            forms[t, w] = rec.form
            n_par[t, w] = k
            params[t, w, :k] = par
            cov[t, w, :k, :k] = np.asarray(rec.covariance, float)
            res = np.asarray(rec.residuals, float)
            n_res[t, w] = res.size
            if res.size == n_p:
                residuals[t, w] = res
            else:  # one residual per simulated point: put it at that point's pressure
                residuals[t, w, np.isfinite(density[t, w]) & np.isfinite(pressures[t])] = res
            for key in scal:
                scal[key][t, w] = float(getattr(rec, key))
            dof[t, w] = int(rec.dof)
            accepted[t, w] = bool(rec.accepted)
    ranges = simulated_ranges(data)  # the range the reader's policies use
    used = sorted({r.form for row in data.fits for r in row})
    names = {n: list(_forms.FORMS[n].parameter_names) for n in used if n in _forms.FORMS}
    return {
        "fits@parameter_names": json.dumps(names),
        "fits/form": forms,
        "fits/n_parameters": n_par,
        "fits/parameters": params,
        "fits/covariance": cov,
        **{f"fits/{k}": v for k, v in scal.items()},
        "fits/dof": dof,
        "fits/n_residuals": n_res,
        "fits/residuals": residuals,
        "fits/accepted": accepted,
        "fits/p_low_Pa": ranges[..., 0],
        "fits/p_high_Pa": ranges[..., 1],
    }


def _field_value(e: _schema.Entry, value: Any) -> Any:
    """A KernelData field as stored in the row ``e``."""
    if e.kind == "attr":
        if e.dtype == "float64":
            return float(value)
        if e.dtype == "int64":
            return np.int64(value)
        return value
    if e.dtype == "bool":
        return np.asarray(value).astype(bool)
    if e.dtype == "float64":
        return np.asarray(value, float)
    return value


def _row_values(data: KernelData) -> dict[str, Any]:
    """The value of every row of the schema (by path) that is not per branch or per extra
    dataset: the KernelData fields converted to their stored type, and the derived rows."""
    n_t, n_w = len(data.temperatures_K), len(data.widths_H_nm)
    n_p = np.asarray(data.pressures_Pa).shape[1]
    n_d = np.asarray(data.dense_pressures_Pa).shape[1]
    prov = data.provenance
    acc = np.asarray(data.accessible).astype(bool)
    first = [np.flatnonzero(acc[t]) for t in range(n_t)]
    hs = np.asarray(data.widths_H_nm, float)
    ws = np.asarray(data.widths_w_nm, float)
    seeds = np.asarray(data.task_seeds)
    values: dict[str, Any] = {
        e.path: _field_value(e, getattr(data, e.field))
        for e in _schema.SCHEMA
        if e.field is not None
    }
    values.update(
        {
            "@format": FORMAT_NAME,
            "@schema_version": _schema.file_schema_version(
                {EQ_GROUP} if data.equilibrium is not None else set()
            ),
            "@created": str(prov.get("created") or _utc_now()),
            "@config_hash": kernel_config_hash(data),
            "@code_version": str(prov.get("code_version") or f"gcmc {__version__}"),
            "@host": str(prov.get("host") or socket.gethostname()),
            "@shape_T_W_P": np.array([n_t, n_w, n_p], dtype=np.int64),
            "axes@description": _schema.entry("axes@description").meaning,
            "axes/pressure_index": np.arange(n_p, dtype=np.int64),
            "axes/dense_index": np.arange(n_d, dtype=np.int64),
            "points@branches": list(data.points),
            "limits/smallest_accessible_width_H_nm": np.array(
                [hs[i[0]] if i.size else np.nan for i in first]
            ),
            "limits/smallest_accessible_width_w_nm": np.array(
                [ws[i[0]] if i.size else np.nan for i in first]
            ),
            "fits@branch": "adsorption",
            "fits@below_range": "henry",
            "fits@width_interpolation": "linear",
            "provenance/provenance_json": json.dumps(data.provenance, default=_json_default),
            "provenance/task_seeds": seeds.astype(np.uint64) if seeds.dtype.kind == "i" else seeds,
            "extra@order": json.dumps(list(data.extra)),
        }
    )
    values.update(_fit_arrays(data))
    return values


def _write_row(
    g: h5py.Group,
    e: _schema.Entry,
    value: Any,
    scales: dict[str, h5py.Dataset],
    data: KernelData,
    units: str | None = None,
) -> None:
    """Write one row of the schema into its group ``g``."""
    if e.kind == "attr":
        g.attrs[e.name] = value
    elif e.kind == "attrdict":
        _write_attr_dict(g.create_group(e.name), value)
    elif e.kind == "text":
        _text(g, e.name, value)
    else:
        description = None
        if e.writes_description:
            description = e.meaning.replace("<width_convention>", data.width_convention)
        dims = labels = None
        if e.dims is not None:
            letters = e.dims.rstrip("*")
            dims = [[scales[s] for s in _schema.DIMENSIONS[c][0]] for c in letters]
            if e.dims.endswith("*"):
                dims += [[]] * (np.ndim(value) - len(letters))
            else:
                labels = [_schema.DIMENSIONS[c][1] for c in letters]
        ds = _dataset(
            g, e.name, value, e.unit if units is None else units, dims, labels, description
        )
        if e.kind == "scale":
            ds.make_scale(e.scale)
            scales[e.path] = ds


def _write_branch(
    bg: h5py.Group, data: KernelData, branch: str, scales: dict[str, h5py.Dataset]
) -> None:
    """One /points/<branch> group: its field order, the fields present, the flags."""
    fields = data.points[branch]
    bg.attrs["field_order"] = list(fields) if fields else np.array([], dtype="S1")
    for fname, arr in fields.items():
        e = _schema.entry(f"{_BRANCH}/{fname}")
        value = np.asarray(arr).astype(bool) if e.dtype == "bool" else np.asarray(arr, float)
        _write_row(bg, e, value, scales, data)
    flags = _schema.entry(f"{_BRANCH}/flags")
    _write_row(bg, flags, np.asarray(data.flags[branch]), scales, data)


_BRANCH = "points/<branch>"


def _write_contents(f: h5py.File, data: KernelData) -> None:
    """Write the rows of :data:`gcmc.kernel.schema.SCHEMA`, in order."""
    values = _row_values(data)
    scales: dict[str, h5py.Dataset] = {}
    for e in _schema.SCHEMA:
        if e.group == _BRANCH:
            if e.name == "field_order":  # the first row of a branch: write them all
                for branch in data.points:
                    _write_branch(f.require_group(f"points/{branch}"), data, branch, scales)
            continue
        if e.group == HEAT_GROUP:  # optional: gcmc.kernel.heat writes the group's rows
            if e.name == "form" and data.heat is not None:
                write_heat(f, data.heat)
            continue
        if e.group == EQ_GROUP:  # optional: gcmc.kernel.eqbranch writes the group's rows
            if e.name == "method" and data.equilibrium is not None:
                write_equilibrium(f, data.equilibrium)
            continue
        g = f.require_group(e.group) if e.group else f
        if e.group == "extra" and e.name == "<name>":
            for key, value in data.extra.items():
                _dataset(g, key, np.asarray(value))
            continue
        _write_row(g, e, values[e.path], scales, data)


def write_kernel(data: KernelData, folder: str | Path) -> Path:
    """Write ``data`` as ``<folder>/<name>.v<version>.h5`` and return the path.

    Refuses (InputError) to overwrite an existing file and to write a KernelData that fails
    :func:`validate`. The file is complete and verified (read back by gcmc.reader) before it
    gets its name (:func:`gcmc.files.atomic_path`, never overwriting); on failure nothing is
    left behind.
    """
    validate(data)
    folder = Path(folder)
    final = kernel_path(folder, data.name, data.version)
    if final.exists():
        raise InputError(f"{final}: exists; kernel files are never overwritten")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{folder}: cannot create the kernel folder ({exc})") from None
    try:
        with atomic_path(final, overwrite=False) as tmp:
            with h5py.File(tmp, "w", libver=LIBVER) as f:
                _write_contents(f, data)
                f.flush()
                digest, group_digests = compute_checksums(f)
                for group, value in group_digests.items():
                    f[group].attrs[CHECKSUM_ATTR] = value
                f.attrs[CHECKSUM_ATTR] = digest
            open_kernel(tmp)  # verify what is on disk before publishing it
    except FileExistsError:
        raise InputError(f"{final}: exists; kernel files are never overwritten") from None
    except InputError:
        raise
    except OSError as exc:
        raise InputError(f"{final}: cannot write the kernel file ({exc})") from None
    return final


__all__ = [
    "config_hash",
    "kernel_config_hash",
    "kernel_path",
    "list_versions",
    "next_version",
    "validate",
    "write_kernel",
]
