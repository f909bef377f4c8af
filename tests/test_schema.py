"""The kernel schema table (gcmc.kernel.schema) against the files the writer makes, the reader,
the README and a file written in schema 1.0 before the table existed.

``tests/data/sample-schema-1.0.v1.h5`` was written by the writer as it was before the schema
table (from ``test_library.make_kernel(name="sample-schema-1.0", n_w=3, n_p=5,
interpolant_width=2)``); ``sample-schema-1.0.expected.{npz,json}`` hold what the reader of
that time read from it, flattened (no pickles).
"""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from gcmc.errors import InputError
from gcmc.kernel import schema
from gcmc.kernel.data import POINT_FIELDS, KernelData
from gcmc.kernel.reader import open_kernel
from gcmc.kernel.writer import write_kernel

REPO = Path(__file__).resolve().parents[1]
DATA = Path(__file__).resolve().parent / "data"
SAMPLE = DATA / "sample-schema-1.0.v1.h5"


def _flatten(obj: object, prefix: str, arrays: dict, meta: dict) -> None:
    """KernelData -> {path: array} and {path: JSON value} (the layout of the expected files)."""
    if dataclasses.is_dataclass(obj):
        meta[prefix + "@type"] = type(obj).__name__
        for f in dataclasses.fields(obj):
            _flatten(getattr(obj, f.name), f"{prefix}/{f.name}", arrays, meta)
    elif isinstance(obj, np.ndarray):
        arrays[prefix] = obj.astype(str) if obj.dtype.kind in "OUS" else obj
    elif (
        isinstance(obj, list)
        and obj
        and (dataclasses.is_dataclass(obj[0]) or isinstance(obj[0], list))
    ):
        meta[prefix + "@len"] = len(obj)
        for i, x in enumerate(obj):
            _flatten(x, f"{prefix}/{i}", arrays, meta)
    elif (
        isinstance(obj, dict)
        and obj
        and all(isinstance(v, np.ndarray | dict) for v in obj.values())
        and prefix.split("/")[-1] in ("points", "flags", "extra", "adsorption", "desorption")
    ):
        meta[prefix + "@keys"] = list(obj)
        for k, v in obj.items():
            _flatten(v, f"{prefix}/{k}", arrays, meta)
    else:
        nan = isinstance(obj, float) and np.isnan(obj)
        meta[prefix] = {"type": type(obj).__name__, "value": "nan" if nan else obj}


def _h5_rows(path: Path) -> set[str]:
    """Every attribute and dataset of a file as schema paths (branches and extra generalised)."""
    out: set[str] = set()
    skip = {schema.CHECKSUM_ATTR, "DIMENSION_LIST", "REFERENCE_LIST", "DIMENSION_LABELS"}
    skip |= {"CLASS", "NAME"}  # HDF5 dimension-scale bookkeeping
    per_dataset = {"units", "description"}  # checked against the table's columns below

    def general(name: str) -> str:
        parts = name.split("/")
        if parts[0] == "points" and len(parts) >= 2:
            parts[1] = "<branch>"
        if parts[0] == "extra" and len(parts) >= 2:
            parts[1] = "<name>"
        return "/".join(parts)

    with h5py.File(path, "r") as f:
        out |= {f"@{k}" for k in f.attrs if k not in skip}

        def visit(name: str, obj: object) -> None:
            g = general(name)
            if g.startswith("model/") or g == "eos/parameters":  # attribute dictionaries
                out.add(g)
                return
            if isinstance(obj, h5py.Dataset):
                out.add(g)
            own = per_dataset if isinstance(obj, h5py.Dataset) else set()
            for k in obj.attrs:  # type: ignore[attr-defined]
                if k not in skip and k not in own:
                    out.add(f"{g}@{k}")

        f.visititems(visit)
    return out


def test_sample_of_schema_1_0_reads_as_before() -> None:
    """The reader driven by the table reads the old file exactly as the old reader did."""
    k = open_kernel(SAMPLE)
    arrays: dict = {}
    meta: dict = {}
    _flatten(k.data, "", arrays, meta)
    expected = json.loads((DATA / "sample-schema-1.0.expected.json").read_text())
    assert k.info == expected["info"]
    # a field added since (the optional heat kernel) reads as absent
    assert meta.pop("/heat") == {"type": "NoneType", "value": None}
    assert meta.pop("/equilibrium") == {"type": "NoneType", "value": None}  # since 1.1
    assert json.loads(json.dumps(meta)) == expected["values"]
    with np.load(DATA / "sample-schema-1.0.expected.npz") as z:
        assert sorted(z.files) == sorted(arrays)
        for name in z.files:
            a, b = arrays[name], z[name]
            assert a.dtype == b.dtype and a.shape == b.shape, name
            np.testing.assert_array_equal(a, b, err_msg=name)


def test_writer_rewrites_the_sample_with_the_same_content(tmp_path: Path) -> None:
    """Read, write again: the content checksum (every attribute and dataset, the dimension
    scales attached) equals the one the old writer stored."""
    k = open_kernel(SAMPLE)
    out = write_kernel(k.data, tmp_path)
    again = open_kernel(out)
    assert again.info["checksum_sha256"] == k.info["checksum_sha256"]


def test_every_row_written_is_in_the_table_and_back(tmp_path: Path) -> None:
    """The file holds exactly the table's rows (nothing written outside it, nothing missing)."""
    rows = _h5_rows(SAMPLE)
    table = {e.path for e in schema.SCHEMA}
    assert rows - table == set()
    optional_groups = {"isosteric_heat", "equilibrium"}  # absent from the sample
    expected = {p for p in table if p.split("/")[0].split("@")[0] not in optional_groups}
    assert expected - rows - {"@" + schema.CHECKSUM_ATTR} == set()


def test_units_and_descriptions_follow_the_table() -> None:
    with h5py.File(SAMPLE, "r") as f:
        for e in schema.SCHEMA:
            if e.kind not in ("dataset", "scale") or e.name == "<name>":
                continue
            if not e.required and e.at("adsorption") not in f:
                continue
            ds = f[e.at("adsorption")]
            if e.unit is None:
                assert "units" not in ds.attrs, e.path
            else:
                assert ds.attrs["units"] == e.unit, e.path
            if e.writes_description and "<" not in e.meaning:
                assert ds.attrs["description"] == e.meaning, e.path
            elif not e.writes_description:
                assert "description" not in ds.attrs, e.path


def test_point_fields_come_from_the_table() -> None:
    rows = [e for e in schema.SCHEMA if e.group == "points/<branch>" and e.kind == "dataset"]
    assert list(POINT_FIELDS) == [e.name for e in rows if e.name != "flags"]
    assert {e.field for e in schema.SCHEMA if e.field} | {
        "points",
        "flags",
        "fits",
        "extra",
        "heat",
        "equilibrium",
    } == {f.name for f in dataclasses.fields(KernelData)}


def test_missing_required_row_is_refused_in_one_line(tmp_path: Path) -> None:
    """A file without a required dataset is refused, naming it (checksums recomputed so that
    the completeness check, not the checksum, is what refuses it)."""
    from gcmc.kernel.reader import compute_checksums

    bad = tmp_path / "sample.v1.h5"
    bad.write_bytes(SAMPLE.read_bytes())
    with h5py.File(bad, "r+") as f:
        del f["limits/accessible"]
        digest, groups = compute_checksums(f)
        for g, v in groups.items():
            f[g].attrs[schema.CHECKSUM_ATTR] = v
        f.attrs[schema.CHECKSUM_ATTR] = digest
    with pytest.raises(InputError) as err:
        open_kernel(bad)
    msg = str(err.value)
    assert "/limits/accessible" in msg and "missing" in msg and "\n" not in msg


def test_readme_section_is_generated_from_the_table(tmp_path: Path) -> None:
    """kernels/README.md holds the table's section as generated (--check exits 0), and a
    stale copy is detected (exit 1) and rewritten."""
    out = subprocess.run(
        [sys.executable, "-m", "gcmc.kernel.schema", "--check"], cwd=REPO, capture_output=True
    )
    assert out.returncode == 0, out.stdout
    stale = tmp_path / "README.md"
    text = (REPO / "kernels" / "README.md").read_text(encoding="utf-8")
    stale.write_text(text.replace("| `accessible` |", "| `accessible_old` |"), encoding="utf-8")
    assert schema.main(["--check", "--readme", str(stale)]) == 1
    assert schema.main(["--readme", str(stale)]) == 0
    assert stale.read_text(encoding="utf-8") == text
    for e in schema.SCHEMA:
        assert f"| `{e.name}` |" in text, e.path


def test_optional_heat_group_rows_and_units_follow_the_table(tmp_path: Path) -> None:
    """A kernel with the isosteric-heat kernel: the optional group's attributes and datasets
    are exactly the table's rows, with the table's units, and the file reads back."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from test_heat_kernel import _with_heat

    data = _with_heat()
    path = write_kernel(data, tmp_path)
    rows = {r for r in _h5_rows(path) if r.startswith("isosteric_heat")}
    table = {e.path for e in schema.SCHEMA if e.group == "isosteric_heat"}
    assert rows == table
    with h5py.File(path, "r") as f:
        for e in schema.SCHEMA:
            if e.group == "isosteric_heat" and e.kind == "dataset":
                assert f[e.path].attrs["units"] == e.unit, e.path
                assert f[e.path].dtype == np.dtype(e.dtype), e.path
    back = open_kernel(path).data.heat
    assert back is not None
    np.testing.assert_array_equal(back.degree, data.heat.degree)
