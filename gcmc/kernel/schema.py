"""The kernel file's schema as one table: every group attribute and dataset of a kernel file.

The table (:data:`SCHEMA`) drives the writer (:mod:`gcmc.kernel.writer` writes the rows in
order), the reader (:mod:`gcmc.kernel.reader` reads the rows that map to a
:class:`gcmc.kernel.data.KernelData` field and refuses a file missing a required row) and the
schema section of ``kernels/README.md`` (between the markers :data:`BEGIN` and :data:`END`):

    python3 -m gcmc.kernel.schema           # rewrite the section
    python3 -m gcmc.kernel.schema --check   # exit 1 if the section is stale

The standard library only: the reader stays light, and the table can be read anywhere.
Group paths may contain ``<branch>``: the row exists once per branch of ``/points``.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

#: The schema this package writes: major.minor. Minor versions only add rows. A file is
#: labelled with the lowest version whose rows it holds (:func:`file_schema_version`): 1.1
#: added the optional group ``equilibrium``, so a file without it is still a 1.0 file.
SCHEMA_VERSION = "1.1"
#: the first schema version of each optional group added since 1.0
GROUP_SINCE: dict[str, str] = {"equilibrium": "1.1"}


def file_schema_version(groups: set[str] | frozenset[str]) -> str:
    """The schema version a file with these top-level groups is labelled with: the newest
    ``since`` among the optional groups it holds, else 1.0."""
    found = [GROUP_SINCE[g] for g in groups if g in GROUP_SINCE]
    return max(found, key=lambda v: tuple(int(x) for x in v.split("."))) if found else "1.0"


SCHEMA_MAJOR = 1
FORMAT_NAME = "gcmc-kernel"
CHECKSUM_ATTR = "checksum_sha256"
DICT_LAYOUT_ATTR = "dict_layout"

#: Dimension letters of the ``dims`` column: the scale datasets attached to that dimension
#: (paths below the root) and the dimension label. ``K`` (fit parameters) has no scale.
DIMENSIONS: dict[str, tuple[tuple[str, ...], str]] = {
    "T": (("axes/temperature_K",), "temperature"),
    "W": (("axes/width_H_nm", "axes/width_w_nm"), "width"),
    "P": (("axes/pressure_index",), "pressure"),
    "D": (("axes/dense_index",), "dense"),
    "K": ((), "parameter"),
}


@dataclass(frozen=True)
class Entry:
    """One row of the schema: an attribute, a dataset or an attribute dictionary.

    Attributes
    ----------
    group : str
        Group path below the root ("" is the root; ``<branch>`` stands for each branch).
    name : str
        Attribute or dataset name.
    kind : str
        "attr", "dataset", "text" (a scalar string dataset), "scale" (a dataset made an HDF5
        dimension scale) or "attrdict" (a group holding an attribute dictionary).
    dtype : str
        Stored type: "str", "int64", "float64", "bool", "uint64", "int32", "json" (JSON text)
        or "any" (free).
    shape : str
        Dimension letters (``T``, ``W``, ``P``, ``D``, ``K``; see :data:`DIMENSIONS`), "" for
        a scalar, or a literal such as "(3)".
    unit : str | None
        The dataset's ``units`` attribute (None: none written).
    meaning : str
        What the value is. For a dataset with ``describe`` it is also written as the
        ``description`` attribute, word for word.
    required : bool
        A reader refuses a file without it.
    since : str
        First schema version with this row.
    field : str | None
        The :class:`gcmc.kernel.data.KernelData` field it holds (None: derived or composite).
    describe : bool
        Write ``meaning`` as the dataset's ``description`` attribute.
    dims : str | None
        Dimension letters whose scales and labels are attached (None: none attached;
        a trailing ``*`` attaches no scale to further dimensions and writes no labels).
    scale : str | None
        For ``kind="scale"``: the scale name.
    note : str
        Documentation only (README), beside ``meaning``.
    """

    group: str
    name: str
    kind: str
    dtype: str
    shape: str
    unit: str | None
    meaning: str
    required: bool = True
    since: str = "1.0"
    field: str | None = None
    describe: bool = True
    dims: str | None = None
    scale: str | None = None
    note: str = ""

    @property
    def is_attr(self) -> bool:
        """True for an attribute of ``group``."""
        return self.kind == "attr"

    @property
    def path(self) -> str:
        """Path below the root: ``group/name`` (datasets, groups) or ``group@name`` (attributes)."""
        sep = "@" if self.is_attr else "/"
        if not self.group:
            return f"@{self.name}" if self.is_attr else self.name
        return f"{self.group}{sep}{self.name}"

    @property
    def writes_description(self) -> bool:
        """True when the writer stores ``meaning`` as the dataset's ``description``."""
        return self.describe and self.kind in ("dataset", "scale") and self.name != "<name>"

    def at(self, branch: str) -> str:
        """:attr:`path` with ``<branch>`` replaced."""
        return self.path.replace("<branch>", branch)

    def shape_text(self) -> str:
        """The shape as documented: ``(T, W, P)``, ``scalar``, ..."""
        if self.shape == "":
            return "scalar"
        if self.shape.startswith("("):
            return self.shape
        letters = self.shape.rstrip("*")
        text = ", ".join(letters)
        return f"({text}[, ...])" if self.shape.endswith("*") else f"({text})"


def _a(group: str, name: str, dtype: str, meaning: str, **kw: Any) -> Entry:
    return Entry(group, name, "attr", dtype, kw.pop("shape", ""), None, meaning, **kw)


def _d(
    group: str, name: str, dtype: str, dims: str, unit: str | None, meaning: str, **kw: Any
) -> Entry:
    return Entry(group, name, "dataset", dtype, dims, unit, meaning, dims=dims, **kw)


def _s(name: str, dtype: str, shape: str, unit: str, scale: str, meaning: str, **kw: Any) -> Entry:
    return Entry("axes", name, "scale", dtype, shape, unit, meaning, scale=scale, **kw)


_PT = "points/<branch>"
_POINT_MEANINGS = (
    ("density_per_nm3", "nm^-3", "absolute density per pore volume (the stored convention)"),
    ("density_per_nm3_stderr", "nm^-3", "standard error of density_per_nm3"),
    ("excess_density_per_nm3", "nm^-3", "absolute minus bulk density"),
    ("molecules_mean", "1", "mean number of molecules in the box"),
    ("molecules_stderr", "1", "standard error of molecules_mean"),
    ("isosteric_heat_kJ_per_mol", "kJ/mol", "isosteric heat from the fluctuation ratio"),
    ("isosteric_heat_kJ_per_mol_stderr", "kJ/mol", "standard error of the isosteric heat"),
    ("fluid_fluid_energy_kJ_per_mol", "kJ/mol", "fluid-fluid energy per molecule"),
    ("fluid_solid_energy_kJ_per_mol", "kJ/mol", "fluid-solid energy per molecule"),
    ("statistical_inefficiency", "samples", "samples per independent sample of N"),
    ("drift_z", "1", "largest |z| of the first-vs-second-half drift test over the replicas"),
    ("replica_agreement_z", "1", "z of the difference of the two replicas' means"),
    ("insertion_acceptance", "1", "accepted fraction of insertion attempts"),
    ("insertion_trials", "1", "trial positions per insertion (1: plain insertion)"),
    ("moves", "1", "moves run, all replicas"),
    ("seconds", "s", "wall-clock time of the point, all replicas"),
    ("converged", "bool", "no flag that makes a point unconverged (see the flags)"),
)

#: (name, dtype, dims, units, meaning) of every dataset of the group, in order
EQUILIBRIUM_DATASETS: tuple[tuple[str, str, str, str, str], ...] = (
    ("has_loop", "bool", "TW", "bool", "the branches part (a hysteresis loop inside the grid)"),
    ("has_transition", "bool", "TW", "bool", "an equilibrium transition was located"),
    ("reason", "str", "TW", "", "why there is no transition ('' when there is one)"),
    ("fugacity_Pa", "float64", "TW", "Pa", "f_eq: bulk fugacity at the transition"),
    ("pressure_Pa", "float64", "TW", "Pa", "p_eq: bulk pressure at the transition"),
    ("ln_f_stderr", "float64", "TW", "1", "statistical standard error of ln f_eq"),
    ("ln_f_integration_error", "float64", "TW", "1", "integration-error estimate of ln f_eq"),
    (
        "pressure_uncertainty_Pa",
        "float64",
        "TW",
        "Pa",
        "p_eq x sqrt(stat^2 + integration^2 + p(f) interpolation^2)",
    ),
    ("extrapolated", "bool", "TW", "bool", "f_eq within one grid interval beyond the overlap"),
    (
        "loop_pressure_range_Pa",
        "float64",
        "TW2",
        "Pa",
        "grid pressures bracketing the loop (below the drop, above the jump)",
    ),
    (
        "density_per_nm3",
        "float64",
        "TWP",
        "nm^-3",
        "equilibrium branch: adsorption below f_eq, desorption above",
    ),
    ("density_per_nm3_stderr", "float64", "TWP", "nm^-3", "standard error of the branch"),
    (
        "anchor_beta_omega_per_nm3",
        "float64",
        "TW",
        "nm^-3",
        "beta Omega/V of the desorption branch's top point, from the path",
    ),
    ("anchor_stderr", "float64", "TW", "nm^-3", "statistical standard error of the anchor"),
    (
        "anchor_integration_error",
        "float64",
        "TW",
        "nm^-3",
        "integration-error estimate of the anchor",
    ),
    ("path_temperature_K", "float64", "TWS", "K", "temperature of each state of the path"),
    ("path_ln_z", "float64", "TWS", "1", "ln(z nm^3) of each state, z = f/(k T)"),
    ("path_density_per_nm3", "float64", "TWS", "nm^-3", "density n of each state"),
    ("path_density_per_nm3_stderr", "float64", "TWS", "nm^-3", "standard error of n"),
    (
        "path_energy_K_per_nm3",
        "float64",
        "TWS",
        "K nm^-3",
        "u = <U>/(k V), configurational energy per pore volume",
    ),
    ("path_energy_K_per_nm3_stderr", "float64", "TWS", "K nm^-3", "standard error of u"),
    ("path_converged", "bool", "TWS", "bool", "the state's point is converged (no flag)"),
    (
        "path_n_variance_per_nm3",
        "float64",
        "TWS",
        "nm^-3",
        "var N / V of each state (= dn/d ln z; NaN: not measured)",
    ),
    (
        "path_nu_covariance_K_per_nm3",
        "float64",
        "TWS",
        "K nm^-3",
        "cov(N, U/k) / V of each state (= du/d ln z = -dn/d beta)",
    ),
    (
        "path_u_variance_K2_per_nm3",
        "float64",
        "TWS",
        "K^2 nm^-3",
        "var(U/k) / V of each state (= -du/d beta)",
    ),
)
#: the group's attributes: (name, meaning)
EQUILIBRIUM_ATTRIBUTES: tuple[tuple[str, str], ...] = (
    ("method", "how the transition and the anchor are computed"),
    ("activity", "the activity z of the path's ln z"),
    ("hot_temperature_K", "temperature of the path's supercritical isotherm (K)"),
)


#: Every row of a kernel file, in the order the writer writes them.
SCHEMA: tuple[Entry, ...] = (
    # ---- root attributes -------------------------------------------------------------------
    _a("", "format", "str", '`"gcmc-kernel"`'),
    _a("", "schema_version", "str", '`"major.minor"` of the schema (this reader: 1.x)'),
    _a("", "name", "str", "kernel name", field="name"),
    _a("", "version", "int64", "kernel version (>= 1)", field="version"),
    _a("", "created", "str", "ISO 8601 time (from the provenance; else the time of writing, UTC)"),
    _a(
        "",
        "sampler",
        "str",
        "how the points were produced, e.g. `gcmc-ladder` (point-wise GCMC)",
        field="sampler",
    ),
    _a(
        "",
        "config_hash",
        "str",
        'identity of the build config: `provenance["config_hash"]`, else SHA-256 of the '
        "config text",
    ),
    _a("", "code_version", "str", "from the provenance (else this package's version)"),
    _a("", "host", "str", "from the provenance (else the host name)"),
    _a("", "shape_T_W_P", "int64", "`[T, W, P]`", shape="(3)"),
    # ---- axes ------------------------------------------------------------------------------
    _a(
        "axes",
        "description",
        "str",
        "coordinates: T temperatures, W pore widths, P pressures per T",
    ),
    _s(
        "temperature_K",
        "float64",
        "T",
        "K",
        "temperature",
        "temperature of each isotherm",
        field="temperatures_K",
        note="strictly increasing",
    ),
    _s(
        "width_H_nm",
        "float64",
        "W",
        "nm",
        "width_H",
        "H: distance between the planes of carbon nuclei of the two innermost layers",
        field="widths_H_nm",
        note="the primary width axis; strictly increasing",
    ),
    _s(
        "width_w_nm",
        "float64",
        "W",
        "nm",
        "width_w",
        "w: the width presented to inversions (<width_convention>)",
        field="widths_w_nm",
        note="follows `/model@width_convention` (default w = H - sigma_ss); strictly increasing",
    ),
    _s(
        "pressure_index",
        "int64",
        "P",
        "1",
        "pressure_index",
        "index into the per-temperature pressure grid",
    ),
    _s(
        "dense_index",
        "int64",
        "D",
        "1",
        "dense_index",
        "index into the per-temperature dense pressure grid",
    ),
    _d(
        "axes",
        "pressure_Pa",
        "float64",
        "TP",
        "Pa",
        "bulk pressure of each simulated point (NaN: no point)",
        field="pressures_Pa",
    ),
    _d(
        "axes",
        "relative_pressure",
        "float64",
        "TP",
        "1",
        "p/p0 (NaN when the grid is absolute or T is above Tc)",
        field="relative_pressures",
    ),
    # ---- model -----------------------------------------------------------------------------
    _a("model", "cutoff_nm", "float64", "fluid-fluid cutoff radius (nm)", field="cutoff_nm"),
    _a("model", "box_nm", "float64", "lateral periodic edge of the box (nm)", field="box_nm"),
    _a(
        "model",
        "tail_correction",
        "str",
        "tail correction beyond the cutoff",
        field="tail_correction",
    ),
    _a(
        "model",
        "width_convention",
        "str",
        "how w follows from H, e.g. `internal: w = H - sigma_ss`",
        field="width_convention",
    ),
    _a(
        "model",
        "pore_volume_convention",
        "str",
        "the pore volume every density is per, e.g. `A * w`",
        field="pore_volume_convention",
    ),
    Entry(
        "model",
        "probe",
        "attrdict",
        "dict",
        "",
        None,
        "the probe (attribute dictionary)",
        field="probe",
    ),
    Entry(
        "model",
        "solid",
        "attrdict",
        "dict",
        "",
        None,
        "the solid (attribute dictionary)",
        field="solid",
    ),
    # ---- equation of state -----------------------------------------------------------------
    _a(
        "eos",
        "name",
        "str",
        "`reference`, `peng-robinson`, `lennard-jones` or `ideal`",
        field="eos",
    ),
    Entry(
        "eos",
        "parameters",
        "attrdict",
        "dict",
        "",
        None,
        "parameters of the equation of state (attribute dictionary)",
        field="eos_parameters",
    ),
    _d(
        "eos",
        "fugacity_Pa",
        "float64",
        "TP",
        "Pa",
        "bulk fugacity at each pressure (the GCMC activity is f/kT)",
        field="fugacities_Pa",
    ),
    _d(
        "eos",
        "bulk_density_per_nm3",
        "float64",
        "TP",
        "nm^-3",
        "bulk number density at each pressure",
        field="bulk_density_per_nm3",
        note="used for excess amounts",
    ),
    _d(
        "eos",
        "saturation_pressure_Pa",
        "float64",
        "T",
        "Pa",
        "p0 of the EOS (NaN above Tc)",
        field="saturation_pressures_Pa",
    ),
    # ---- points ----------------------------------------------------------------------------
    _a(
        "points",
        "branches",
        "str",
        "the branches: `adsorption` always, `desorption` if run",
        shape="(branches)",
    ),
    _a(
        "points/<branch>",
        "field_order",
        "str",
        "the point fields stored, in order",
        shape="(fields)",
    ),
    *(
        _d(
            _PT,
            name,
            "bool" if unit == "bool" else "float64",
            "TWP",
            unit,
            meaning,
            describe=False,
            required=name == "density_per_nm3",
        )
        for name, unit, meaning in _POINT_MEANINGS
    ),
    _d(
        _PT,
        "flags",
        "str",
        "TWP",
        "",
        "diagnostic flags of each point ('' when clean)",
        note="see *Point flags* below",
    ),
    # ---- limits ----------------------------------------------------------------------------
    _d(
        "limits",
        "henry_constant_per_nm3_per_Pa",
        "float64",
        "TW",
        "nm^-3 Pa^-1",
        "exact Henry constant: lim p->0 of density/p",
        field="henry_per_nm3_per_pa",
    ),
    _d(
        "limits",
        "accessible",
        "bool",
        "TW",
        "bool",
        "the pore admits the probe",
        field="accessible",
    ),
    _d(
        "limits",
        "smallest_accessible_width_H_nm",
        "float64",
        "T",
        "nm",
        "smallest accessible kernel width H (NaN: none)",
    ),
    _d(
        "limits",
        "smallest_accessible_width_w_nm",
        "float64",
        "T",
        "nm",
        "smallest accessible kernel width w (NaN: none)",
    ),
    # ---- fits ------------------------------------------------------------------------------
    _a("fits", "branch", "str", '`"adsorption"`: the branch the fits describe'),
    _a(
        "fits",
        "above_range",
        "str",
        "`clamp` or `refuse` above the simulated range",
        field="above_range",
    ),
    _a(
        "fits", "below_range", "str", '`"henry"`: the Henry-law extension below the simulated range'
    ),
    _a("fits", "width_interpolation", "str", '`"linear"` in width between kernel widths'),
    _a("fits", "parameter_names", "json", "form -> parameter names, for the forms used"),
    _d(
        "fits",
        "form",
        "str",
        "TW",
        "",
        "correlating form name (gcmc.kernel.forms)",
        note="a name of `gcmc.kernel.forms.FORMS`, `monotone_interpolant` or `zero`",
    ),
    _d("fits", "n_parameters", "int32", "TW", "1", "parameters used (rest NaN)"),
    _d(
        "fits",
        "parameters",
        "float64",
        "TWK",
        "form units",
        "fitted parameters, NaN-padded to the longest form",
    ),
    _d("fits", "covariance", "float64", "TWKK", "form units^2", "parameter covariance, NaN-padded"),
    _d("fits", "chi2", "float64", "TW", "1", "chi-square of the fit", describe=False),
    _d("fits", "dof", "int64", "TW", "1", "degrees of freedom"),
    _d("fits", "reduced_chi2", "float64", "TW", "1", "chi2 / dof", describe=False),
    _d("fits", "p_value", "float64", "TW", "1", "chi-square survival"),
    _d("fits", "aicc", "float64", "TW", "1", "corrected Akaike criterion"),
    _d(
        "fits",
        "n_residuals",
        "int32",
        "TW",
        "1",
        "length of the fit's residual vector (P: one per pressure; else one per point)",
    ),
    _d(
        "fits",
        "residuals",
        "float64",
        "TWP",
        "1",
        "(simulated - fitted)/stderr at each pressure",
        note="if `n_residuals` < P the fit had one residual per simulated point: stored at the "
        "points with a finite density and pressure, NaN elsewhere",
    ),
    _d("fits", "accepted", "bool", "TW", "bool", "passed the goodness-of-fit test"),
    _d(
        "fits",
        "p_low_Pa",
        "float64",
        "TW",
        "Pa",
        "lowest simulated pressure of the pore: the Henry extension applies below",
    ),
    _d(
        "fits",
        "p_high_Pa",
        "float64",
        "TW",
        "Pa",
        "highest simulated pressure of the pore: above_range applies above",
    ),
    # ---- dense table -----------------------------------------------------------------------
    _d(
        "dense",
        "pressure_Pa",
        "float64",
        "TD",
        "Pa",
        "pressures of the dense table",
        field="dense_pressures_Pa",
        describe=False,
    ),
    _d(
        "dense",
        "density_per_nm3",
        "float64",
        "TWD",
        "nm^-3",
        "absolute density evaluated from the fits",
        field="dense_density_per_nm3",
        note="a convenience table for codes that do not evaluate forms",
    ),
    # ---- provenance ------------------------------------------------------------------------
    Entry(
        "provenance",
        "config_text",
        "text",
        "str",
        "",
        None,
        "the full build config",
        field="config_text",
    ),
    Entry(
        "provenance",
        "provenance_json",
        "text",
        "json",
        "",
        None,
        "JSON of the provenance dict (code and library versions, host, created, seeds, ...)",
        field="provenance",
    ),
    _d(
        "provenance",
        "task_seeds",
        "uint64",
        "TW*",
        "1",
        "entropy words of each task's random stream (numpy SeedSequence)",
        field="task_seeds",
    ),
    _d(
        "provenance",
        "task_seconds",
        "float64",
        "TW",
        "s",
        "wall-clock cost of each task",
        field="task_seconds",
    ),
    # ---- extra -----------------------------------------------------------------------------
    _a("extra", "order", "json", "the names of the extra datasets, in order", required=False),
    Entry(
        "extra",
        "<name>",
        "dataset",
        "any",
        "any",
        None,
        "free per-task or per-kernel datasets of a sampler; the reader does not depend on them",
        required=False,
        describe=False,
    ),
    # ---- isosteric-heat kernel (optional; written and read by gcmc.kernel.heat) -------------
    _a("isosteric_heat", "form", "str", '`"loading_polynomial"`', required=False),
    _a("isosteric_heat", "equation", "str", "the form's equation", required=False),
    _a(
        "isosteric_heat",
        "reference",
        "str",
        "where the heats and the form come from",
        required=False,
    ),
    *(
        Entry(
            "isosteric_heat",
            name,
            "dataset",
            dtype,
            shape,
            unit,
            meaning,
            required=False,
            describe=False,
        )
        for name, dtype, shape, unit, meaning in (
            (
                "coefficients",
                "float64",
                "TW4",
                "kJ/mol per (nm^-3)^i",
                "a_i of q_st(n) = sum_i a_i n^i, NaN beyond the degree",
            ),
            (
                "covariance",
                "float64",
                "TW44",
                "(kJ/mol)^2 per (nm^-3)^(i+j)",
                "covariance of the a_i, scaled by max(1, chi2/dof)",
            ),
            (
                "degree",
                "int64",
                "TW",
                "1",
                "0..3; -1 where no heat was fitted (inaccessible pores, no point with an error)",
            ),
            ("chi2", "float64", "TW", "1", "chi-square of the heat fit"),
            ("dof", "int64", "TW", "1", "degrees of freedom of the heat fit"),
            (
                "loading_range_per_nm3",
                "float64",
                "TW2",
                "nm^-3",
                "the fitted range of loadings [n_lo, n_hi]",
            ),
        )
    ),
    # ---- equilibrium branch (optional, since 1.1; gcmc.kernel.eqbranch) ---------------------
    *(
        _a(
            "equilibrium",
            name,
            "float64" if name.endswith("_K") else "str",
            meaning,
            required=False,
            since="1.1",
        )
        for name, meaning in EQUILIBRIUM_ATTRIBUTES
    ),
    *(
        Entry(
            "equilibrium", name, "dataset", dtype, dims, unit, meaning, required=False, since="1.1"
        )
        for name, dtype, dims, unit, meaning in EQUILIBRIUM_DATASETS
    ),
)

#: Quantities stored per simulated point, with their units (dataset name -> units).
POINT_FIELDS: dict[str, str] = {
    e.name: str(e.unit)
    for e in SCHEMA
    if e.group == _PT and e.kind == "dataset" and e.name != "flags"
}

#: Rows by path (``group/name`` or ``group@name``).
BY_PATH: dict[str, Entry] = {e.path: e for e in SCHEMA}

#: The top-level groups, in the order they are written.
GROUPS: tuple[str, ...] = tuple(dict.fromkeys(e.group.split("/")[0] for e in SCHEMA if e.group))


def entry(path: str) -> Entry:
    """The row at ``path`` (``group/name`` or ``group@name``; ``<branch>`` for a branch)."""
    return BY_PATH[path]


def group_entries(group: str) -> tuple[Entry, ...]:
    """The rows of one group (exactly that group path), in table order."""
    return tuple(e for e in SCHEMA if e.group == group)


# --------------------------------------------------------------------------------------------
# the README section
# --------------------------------------------------------------------------------------------
BEGIN = "<!-- schema table: generated by `python3 -m gcmc.kernel.schema`; do not edit -->"
END = "<!-- end of the generated schema table -->"

_GROUP_NOTES: dict[str, str] = {
    "": "`checksum_sha256` (see *Checksums*) is added after the content.",
    "axes": (
        "The axes are HDF5 dimension scales (`make_scale`); the arrays attach them to their "
        "dimensions: T -> `temperature_K`; W -> both `width_H_nm` and `width_w_nm`; P -> "
        "`pressure_index`; D -> `dense_index`. Dimension labels: `temperature`, `width`, "
        "`pressure`, `dense`, `parameter`."
    ),
    "model": (
        "`probe` and `solid` are *attribute dictionaries*: each key is an attribute; str, "
        "int, float and bool values are stored as themselves, anything else (None, lists, "
        'nested dicts) as JSON text; the attribute `dict_layout` holds JSON `{"order": [keys], '
        '"json": [JSON-encoded keys]}`.'
    ),
    "points": (
        "One group per branch: `adsorption` always; `desorption` when the descending ladder "
        "was run (NaN where no point was run). Only `density_per_nm3` is required of the point "
        "fields; `field_order` lists those present."
    ),
    "fits": (
        "The adsorption branch. Parameter units follow the form: amounts in nm^-3, affinities "
        "in 1/Pa, shapes dimensionless. The `monotone_interpolant` packs `[ln p_1..K, "
        "n_1..K, slopes_1..K]` (slopes dn/d(ln p); `gcmc.kernel.forms.pack_interpolant`). "
        "`zero` marks a pore too narrow for the probe: no parameters, n = 0."
    ),
    "extra": "`extra@order` keeps the order of the free datasets.",
    "equilibrium": (
        "Optional (schema 1.1; builds with an `[equilibrium]` table). Per temperature and "
        "width: the equilibrium transition of a pore whose adsorption and desorption branches "
        "part (`gcmc.kernel.equilibrium`: the grand potentials of both branches by "
        "thermodynamic integration, equal at f_eq; Peterson & Gubbins, Mol. Phys. 62 (1987) "
        "215), the equilibrium branch on the pressure grid (adsorption below f_eq, desorption "
        "above; the adsorption branch where there is no loop), and the liquid branch's anchor: "
        "beta Omega/V of the top grid point integrated along a reversible path of simulated "
        "states, d(beta Omega/V) = u d beta - n d ln z, z = f/(kT), through a supercritical "
        "isotherm (`gcmc.pipeline.anchor`). `S` is the number of states of the path "
        "(NaN-padded). Files without the group read as before (`KernelData.equilibrium` None)."
    ),
    "isosteric_heat": (
        "Optional (kernels built since the heat kernel exists). The isosteric-heat kernel, "
        "fitted across pressure per width (`gcmc.kernel.heat`, `gcmc.pipeline.heat`): q_st(n) "
        "= sum_i a_i n^i in the pore's absolute density n (nm^-3), the form of the virial "
        "isotherm's heat (Czepirski & Jagiełło, Chem. Eng. Sci. 44 (1989) 797), fitted by "
        "weighted least squares to the per-point heats of the adsorption branch (fluctuation "
        "formula) with the highest degree the points allow (min(3, N - 2)); the loadings' "
        "errors enter by effective variance. a_0 is the zero-loading (Henry-limit) heat; "
        "`tests/test_heat_kernel.py` checks it against the exact R d ln K_H / d(1/T) from the "
        "Henry quadrature."
    ),
}


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("<", "&lt;").replace(">", "&gt;")


def render_markdown() -> str:
    """The README's schema section (between :data:`BEGIN` and :data:`END`, markers included)."""
    from gcmc.kernel import flags as _flags  # standard library only as well

    lines = [BEGIN, ""]
    lines.append(
        'Every dataset has a `units` attribute (`"1"` dimensionless, `"bool"` boolean, `""` '
        "strings) except the scalar text datasets and `/extra`; a dataset marked *d* also has "
        "its meaning as a `description` attribute. Shapes: `T` temperatures, `W` pore widths, "
        "`P` pressures per temperature (NaN-padded), `D` dense-table pressures, `K` the "
        "largest number of fit parameters, `S` the states of an equilibrium anchor path."
    )
    for group in ("", *dict.fromkeys(e.group for e in SCHEMA if e.group)):
        rows = group_entries(group)
        title = "/" + group.replace("<branch>", "&lt;branch&gt;")
        lines += ["", f"### `{title}`" if group else "### Root attributes", ""]
        if group in _GROUP_NOTES:
            lines += [_GROUP_NOTES[group], ""]
        lines.append("| name | kind | type | shape | units | meaning | required | since |")
        lines.append("|---|---|---|---|---|---|---|---|")
        for e in rows:
            kind = e.kind + (f" `{e.scale}`" if e.scale else "")
            kind += " *d*" if e.writes_description else ""
            meaning = e.meaning + (f"; {e.note}" if e.note else "")
            lines.append(
                f"| `{e.name}` | {kind} | {e.dtype} | {_cell(e.shape_text())} | "
                f"{'' if e.unit is None else _cell(e.unit) or '(empty)'} | {_cell(meaning)} | "
                f"{'yes' if e.required else 'no'} | {e.since} |"
            )
    lines += ["", "### Point flags", ""]
    lines.append(
        'A point\'s `flags` joins its flags with `"; "`; each starts with its kind, an index '
        "`[r]` names the replica (in the certificate's flags, the preparation), and a colon "
        "precedes the detail. `converged = 0` exactly when a flag that makes a point "
        "unconverged is present."
    )
    lines += ["", "| flag | makes unconverged | meaning |", "|---|---|---|"]
    for fl in _flags.FLAGS:
        lines.append(f"| `{fl.name}` | {'yes' if fl.unconverged else 'no'} | {_cell(fl.meaning)} |")
    lines += ["", END]
    return "\n".join(lines) + "\n"


README = Path(__file__).resolve().parents[2] / "kernels" / "README.md"


def update_readme(path: Path = README, check: bool = False) -> bool:
    """Rewrite the generated section of ``path``; with ``check``, only compare.

    Returns True when the file is (or now is) up to date; with ``check`` False when stale.
    """
    if not path.is_file():
        raise SystemExit(f"{path}: no such file (run from a source checkout, or give --readme)")
    text = path.read_text(encoding="utf-8")
    if BEGIN not in text or END not in text:
        raise SystemExit(f"{path}: the schema markers are missing")
    head, rest = text.split(BEGIN, 1)
    _, tail = rest.split(END, 1)
    new = head + render_markdown().rstrip("\n") + tail
    if new == text:
        return True
    if check:
        return False
    from gcmc.files import atomic_write_text

    atomic_write_text(path, new)
    return True


def main(argv: list[str] | None = None) -> int:
    """Command line: rewrite the README's schema section, or check it (``--check``)."""
    parser = argparse.ArgumentParser(prog="python3 -m gcmc.kernel.schema", description=main.__doc__)
    parser.add_argument("--check", action="store_true", help="exit 1 if the section is stale")
    parser.add_argument("--readme", type=Path, default=README, help="the file to update")
    args = parser.parse_args(argv)
    ok = update_readme(args.readme, check=args.check)
    if not ok:
        print(f"{args.readme}: the schema section is stale; run python3 -m gcmc.kernel.schema")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
