"""What changed between two kernels of the same probe (``gcmc diff``): config and model
fields side by side, and the densities of B against A at A's grid points, in combined standard
errors (B interpolated linearly in width where the grids differ)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from gcmc.errors import InputError
from gcmc.kernel.data import KernelData
from gcmc.kernel.reader import Kernel
from gcmc.quality.criteria import _branch_arrays, _label, _mmol, as_kernel, jsonable


@dataclass
class DiffReport:
    """The differences between two kernels: settings changed and, per width, the largest
    difference of the isotherms in combined standard errors."""

    a: str
    b: str
    probe: str
    changes: list[tuple[str, str, str, str]]  # (section, field, in A, in B)
    widths: list[dict[str, Any]]  # per temperature and width of A's grid
    grids_identical: bool
    method: str
    max_sigma: float

    def largest(self) -> float:
        """The largest difference over all widths, in combined standard errors."""
        vals = [r["max_sigma"] for r in self.widths if np.isfinite(r["max_sigma"])]
        return max(vals) if vals else 0.0

    def to_dict(self) -> dict[str, Any]:
        """The report as JSON-ready dict."""
        return jsonable(
            {
                "a": self.a,
                "b": self.b,
                "probe": self.probe,
                "changes": [
                    dict(zip(("section", "field", "a", "b"), c, strict=True)) for c in self.changes
                ],
                "grids_identical": self.grids_identical,
                "method": self.method,
                "largest_deviation_sigma": self.largest(),
                "threshold_sigma": self.max_sigma,
                "widths": self.widths,
            }
        )


def _short(x: Any) -> str:
    if isinstance(x, np.ndarray):
        x = x[np.isfinite(x)] if x.dtype.kind == "f" else x
        if x.size == 0:
            return "[]"
        if x.size <= 6:
            return "[" + ", ".join(f"{v:.6g}" for v in x.ravel()) + "]"
        return f"{x.size} values {np.min(x):.6g}..{np.max(x):.6g}"
    return str(x)


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        a, b = np.asarray(a), np.asarray(b)
        if a.shape != b.shape:
            return False
        if a.dtype.kind == "f" or b.dtype.kind == "f":
            return bool(np.allclose(a, b, rtol=1e-12, atol=0.0, equal_nan=True))
        return bool(np.array_equal(a, b))
    if isinstance(a, float) and isinstance(b, float):
        return a == b or (math.isnan(a) and math.isnan(b))
    return a == b


def _dict_changes(section: str, a: dict, b: dict, skip: tuple[str, ...] = ()) -> list:
    out = []
    for key in sorted(set(a) | set(b)):
        if key in skip:
            continue
        va, vb = a.get(key, "(absent)"), b.get(key, "(absent)")
        if not _same(va, vb):
            out.append((section, key, _short(va), _short(vb)))
    return out


def _probe_name(data: KernelData) -> str:
    return str(data.probe.get("name", "")).strip().lower()


def diff_kernels(
    a: Kernel | KernelData, b: Kernel | KernelData, max_sigma: float = 3.0
) -> DiffReport:
    """What changed between two kernels of the same probe, and the largest deviation per width
    in combined errors (see gcmc diff --help)."""
    a, b = as_kernel(a), as_kernel(b)
    da, db = a.data, b.data
    if _probe_name(da) != _probe_name(db):
        raise InputError(
            f"{_label(b)}: probe {db.probe.get('name')!r} differs from "
            f"{da.probe.get('name')!r} of {_label(a)}: diff compares kernels of "
            "the same probe"
        )
    if not (np.isfinite(max_sigma) and max_sigma > 0):
        raise InputError(f"--max-sigma: must be > 0, got {max_sigma}")
    ch: list[tuple[str, str, str, str]] = []
    for fld in ("name", "version", "sampler"):
        va, vb = getattr(da, fld), getattr(db, fld)
        if va != vb:
            ch.append(("kernel", fld, str(va), str(vb)))
    ch += _dict_changes("model: probe", da.probe, db.probe, skip=("sources",))
    ch += _dict_changes("model: solid", da.solid, db.solid)
    for fld in (
        "cutoff_nm",
        "box_nm",
        "tail_correction",
        "width_convention",
        "pore_volume_convention",
        "above_range",
    ):
        va, vb = getattr(da, fld), getattr(db, fld)
        if not _same(va, vb):
            ch.append(("model", fld, _short(va), _short(vb)))
    if da.eos != db.eos:
        ch.append(("eos", "name", da.eos, db.eos))
    pa_, pb_ = da.provenance or {}, db.provenance or {}
    for key in ("code_version", "config_hash", "seed"):
        if key in pa_ or key in pb_:
            va, vb = pa_.get(key, "(absent)"), pb_.get(key, "(absent)")
            if va != vb:
                ch.append(("provenance", key, _short(va), _short(vb)))
    for key in ("sampling", "fit"):
        da_, db_ = pa_.get(key), pb_.get(key)
        if isinstance(da_, dict) and isinstance(db_, dict):
            ch += _dict_changes(f"provenance: {key}", da_, db_)
    ch += _dict_changes("eos: parameters", da.eos_parameters, db.eos_parameters)
    for fld in ("temperatures_K", "widths_H_nm", "widths_w_nm"):
        va, vb = np.asarray(getattr(da, fld), float), np.asarray(getattr(db, fld), float)
        if not _same(va, vb):
            ch.append(("grid", fld, _short(va), _short(vb)))
    common_t = []
    for ta, temp in enumerate(da.temperatures_K):
        hit = np.flatnonzero(np.abs(db.temperatures_K - temp) <= 1e-9 * abs(temp))
        if hit.size:
            common_t.append((ta, int(hit[0])))
    for ta, tb in common_t:
        pa, pb = np.asarray(da.pressures_Pa[ta], float), np.asarray(db.pressures_Pa[tb], float)
        if not _same(pa, pb):
            ch.append(
                ("grid", f"pressures_Pa at {da.temperatures_K[ta]:g} K", _short(pa), _short(pb))
            )
    if not common_t:
        raise InputError(f"{_label(b)}: no temperature in common with {_label(a)}")
    identical = _same(np.asarray(da.widths_w_nm, float), np.asarray(db.widths_w_nm, float)) and all(
        _same(np.asarray(da.pressures_Pa[ta], float), np.asarray(db.pressures_Pa[tb], float))
        for ta, tb in common_t
    )
    na, _, sa = _branch_arrays(da, "adsorption")
    nb, _, sb = _branch_arrays(db, "adsorption")
    rows = []
    wb_axis = np.asarray(db.widths_w_nm, float)
    for ta, tb in common_t:
        temp = float(da.temperatures_K[ta])
        pa = np.asarray(da.pressures_Pa[ta], float)
        if identical:
            for j in range(len(da.widths_w_nm)):
                ok = np.isfinite(na[ta, j]) & np.isfinite(nb[tb, j])
                rows.append(
                    _diff_row(
                        da, ta, j, pa, ok, na[ta, j], nb[tb, j], np.hypot(sa[ta, j], sb[tb, j])
                    )
                )
            continue
        pb = np.asarray(db.pressures_Pa[tb], float)
        okb = np.isfinite(pb) & (pb > 0)
        p_lo, p_hi = float(np.min(pb[okb])), float(np.max(pb[okb]))
        for j in range(len(da.widths_w_nm)):
            w = float(da.widths_w_nm[j])
            if w < wb_axis[0] - 1e-12 or w > wb_axis[-1] + 1e-12:
                rows.append(
                    {
                        "T_K": temp,
                        "w_nm": w,
                        "H_nm": float(da.widths_H_nm[j]),
                        "max_sigma": float("nan"),
                        "note": "outside B's width range",
                    }
                )
                continue
            ok = np.isfinite(na[ta, j]) & (pa >= p_lo * (1 - 1e-12)) & (pa <= p_hi * (1 + 1e-12))
            if not np.any(ok):
                rows.append(
                    {
                        "T_K": temp,
                        "w_nm": w,
                        "H_nm": float(da.widths_H_nm[j]),
                        "max_sigma": float("nan"),
                        "note": "no common pressures",
                    }
                )
                continue
            vb = np.full(pa.shape, np.nan)
            vb[ok] = b.evaluate(pa[ok], [w], temp)[:, 0]
            eb = np.full(pa.shape, np.nan)
            eb[ok] = _interp_error(db, tb, sb[tb], w, pa[ok])
            rows.append(
                _diff_row(
                    da, ta, j, pa, ok & np.isfinite(vb), na[ta, j], vb, np.hypot(sa[ta, j], eb)
                )
            )
    method = (
        "points against points (identical grids), combined sigma = sqrt(sA^2 + sB^2)"
        if identical
        else "A's points against B evaluated (fits, linear in width) on A's widths and "
        "pressures inside B's ranges; B's error interpolated linearly in width and ln p; "
        "combined sigma = sqrt(sA^2 + sB^2)"
    )
    return DiffReport(
        a=_label(a),
        b=_label(b),
        probe=str(da.probe.get("name")),
        changes=ch,
        widths=rows,
        grids_identical=identical,
        method=method,
        max_sigma=float(max_sigma),
    )


def _interp_error(d: KernelData, t: int, sig: np.ndarray, w: float, p: np.ndarray) -> np.ndarray:
    axis = np.asarray(d.widths_w_nm, float)
    j = int(np.clip(np.searchsorted(axis, w, side="right") - 1, 0, axis.size - 2))
    a = (w - axis[j]) / (axis[j + 1] - axis[j])
    e = (1 - a) * sig[j] + a * sig[j + 1]
    grid = np.asarray(d.pressures_Pa[t], float)
    ok = np.isfinite(grid) & np.isfinite(e) & (grid > 0)
    if np.count_nonzero(ok) == 0:
        return np.full(p.shape, np.nan)
    order = np.argsort(grid[ok])
    return np.interp(np.log(p), np.log(grid[ok][order]), e[ok][order])


def _diff_row(
    d: KernelData,
    t: int,
    j: int,
    p: np.ndarray,
    ok: np.ndarray,
    xa: np.ndarray,
    xb: np.ndarray,
    comb: np.ndarray,
) -> dict[str, Any]:
    row: dict[str, Any] = {
        "T_K": float(d.temperatures_K[t]),
        "w_nm": float(d.widths_w_nm[j]),
        "H_nm": float(d.widths_H_nm[j]),
    }
    ok = ok & np.isfinite(comb) & (comb > 0)
    if not np.any(ok):
        row.update(max_sigma=float("nan"), note="nothing to compare")
        return row
    z = np.where(ok, (xb - xa) / np.where(ok, comb, 1.0), 0.0)
    k = int(np.argmax(np.abs(z)))
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = (xb[k] - xa[k]) / xa[k] if xa[k] != 0 else float("nan")
    row.update(
        max_sigma=float(abs(z[k])),
        signed_sigma=float(z[k]),
        at_p_Pa=float(p[k]),
        a_mmol_cm3=_mmol(xa[k]),
        b_mmol_cm3=_mmol(xb[k]),
        rel_difference=float(rel),
        n_compared=int(np.count_nonzero(ok)),
    )
    return row


def format_diff(rep: DiffReport) -> str:
    """The text printed by ``gcmc diff``."""
    out = [f"gcmc diff: A = {rep.a}", f"           B = {rep.b}", f"probe: {rep.probe}", ""]
    if rep.changes:
        out.append("changed (section / field: A -> B):")
        out += [f"  {s} / {f}: {va} -> {vb}" for s, f, va, vb in rep.changes]
    else:
        out.append("model, EOS, grid and recorded provenance: no change")
    out.append("")
    out.append(f"largest deviation per width ({rep.method}):")
    out.append(
        f"  {'T (K)':>8} {'w (nm)':>8} {'H (nm)':>8} {'max |dn|/sigma':>15} "
        f"{'at p (Pa)':>11} {'A':>10} {'B (mmol/cm3)':>13}"
    )
    for r in rep.widths:
        if not np.isfinite(r.get("max_sigma", float("nan"))):
            out.append(
                f"  {r['T_K']:>8g} {r['w_nm']:>8.4g} {r['H_nm']:>8.4g} "
                f"{'-':>15} {r.get('note', '')}"
            )
            continue
        mark = "  <-- beyond threshold" if r["max_sigma"] > rep.max_sigma else ""
        out.append(
            f"  {r['T_K']:>8g} {r['w_nm']:>8.4g} {r['H_nm']:>8.4g} {r['max_sigma']:>15.2f} "
            f"{r['at_p_Pa']:>11.4g} {r['a_mmol_cm3']:>10.4g} {r['b_mmol_cm3']:>13.4g}"
            f"{mark}"
        )
    out.append("")
    n_beyond = sum(
        1
        for r in rep.widths
        if np.isfinite(r.get("max_sigma", np.nan)) and r["max_sigma"] > rep.max_sigma
    )
    if n_beyond:
        out.append(
            f"kernels differ: {n_beyond} width(s) beyond {rep.max_sigma:g} combined sigma "
            f"(largest {rep.largest():.2f})"
        )
    else:
        out.append(
            f"kernels agree within {rep.max_sigma:g} combined sigma (largest {rep.largest():.2f})"
        )
    return "\n".join(out)


__all__ = ["DiffReport", "diff_kernels", "format_diff"]
