"""Kernel library: writer (gcmc.kernel.writer), reader (gcmc.reader) and `gcmc show/export`.

The kernels here are invented demo data for format tests: Langmuir isotherms whose constants
vary smoothly with the pore width, "measured" with a stated 1 % relative standard error and
fitted by weighted least squares. No physics is checked against outside sources here except
the Langmuir form itself (I. Langmuir, J. Am. Chem. Soc. 40 (1918) 1361) and its exact Henry
limit K_H = n_m b.
"""

from __future__ import annotations

import csv
import dataclasses
import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
from scipy import optimize, stats

from gcmc import cli
from gcmc.errors import InputError
from gcmc.kernel import forms
from gcmc.kernel.data import POINT_FIELDS, FitRecord, KernelData
from gcmc.kernel.reader import compute_checksums, open_kernel
from gcmc.kernel.writer import config_hash, list_versions, next_version, write_kernel

K_B = 1.380649e-23  # J/K, CODATA 2018 exact
SIGMA_SS = 0.34  # nm, the internal-width convention w = H - sigma_ss
REL_ERR = 0.01  # stated relative standard error of the demo "simulated" densities


# --------------------------------------------------------------------------------------------
# an invented demo kernel
# --------------------------------------------------------------------------------------------
def langmuir_constants(h: np.ndarray, temperature: float) -> tuple[np.ndarray, np.ndarray]:
    """Demo Langmuir capacity n_m (nm^-3) and affinity b (1/Pa), smooth in H (nm)."""
    h = np.asarray(h, dtype=float)
    n_m = 18.0 + 6.0 * np.tanh(2.0 * (h - 0.9))
    b = 2e-5 * np.exp((900.0 / temperature) * (0.6 / h))
    return n_m, b


def langmuir(h: np.ndarray, temperature: float, p: np.ndarray) -> np.ndarray:
    n_m, b = langmuir_constants(np.atleast_1d(h), temperature)
    bp = b[:, None] * np.asarray(p, float)[None, :]
    return n_m[:, None] * bp / (1.0 + bp)  # (W, P)


def _fit_record(p: np.ndarray, n: np.ndarray, s: np.ndarray, exact: tuple | None) -> FitRecord:
    """Weighted Langmuir fit (exact=None) or the exact generating parameters with the
    covariance the stated errors imply."""

    def model(pp: np.ndarray, n_m: float, b: float) -> np.ndarray:
        return n_m * b * pp / (1.0 + b * pp)

    if exact is None:
        n_m0 = float(n.max()) * 1.2
        par, cov = optimize.curve_fit(
            model, p, n, p0=[n_m0, 1.0 / np.median(p)], sigma=s, absolute_sigma=True, maxfev=20000
        )
    else:
        par = np.array(exact, dtype=float)
        jac = np.stack([par[1] * p / (1 + par[1] * p), par[0] * p / (1 + par[1] * p) ** 2], 1)
        jw = jac / s[:, None]
        cov = np.linalg.inv(jw.T @ jw)
    r = (n - model(p, *par)) / s
    chi2 = float(r @ r)
    dof = p.size - 2
    return FitRecord(
        form="langmuir",
        parameters=np.asarray(par),
        covariance=np.asarray(cov),
        chi2=chi2,
        dof=dof,
        reduced_chi2=chi2 / dof,
        p_value=float(stats.chi2.sf(chi2, dof)),
        aicc=chi2 + 4 + 12 / (p.size - 3),
        residuals=r,
        accepted=bool(stats.chi2.sf(chi2, dof) >= 1e-3),
    )


def make_kernel(
    name: str = "demo-kernel",
    version: int = 1,
    noise: bool = True,
    above_range: str = "clamp",
    n_w: int = 10,
    n_p: int = 14,
    seed: int = 20240611,
    interpolant_width: int | None = 4,
) -> KernelData:
    """A complete demo KernelData. Width 0 is too narrow for the probe (form 'zero');
    ``interpolant_width`` stores the monotone interpolant (through the noise-free data)."""
    rng = np.random.default_rng(seed)
    temps = np.array([150.0, 200.0])
    h = np.concatenate([[0.30], np.linspace(0.55, 1.6, n_w - 1)])
    w = h - SIGMA_SS
    p = np.tile(np.geomspace(1e3, 5e6, n_p), (2, 1))
    p[1, -1] = np.nan  # the second temperature has one pressure fewer (NaN padding)
    n_t = temps.size
    shape = (n_t, n_w, n_p)
    bulk = p / (K_B * temps[:, None]) / 1e27  # ideal gas, molecules/nm^3
    dens = np.full(shape, np.nan)
    err = np.full(shape, np.nan)
    fits: list[list[FitRecord]] = []
    henry = np.zeros((n_t, n_w))
    for t, temp in enumerate(temps):
        ok = np.isfinite(p[t])
        pt = p[t, ok]
        true = langmuir(h, temp, pt)
        n_m, b = langmuir_constants(h, temp)
        henry[t] = n_m * b
        henry[t, 0] = 0.0
        row = []
        for j in range(n_w):
            if j == 0:
                dens[t, j, ok] = 0.0
                err[t, j, ok] = 0.0
                row.append(
                    FitRecord(
                        "zero",
                        np.empty(0),
                        np.empty((0, 0)),
                        0.0,
                        int(pt.size),
                        0.0,
                        1.0,
                        0.0,
                        np.zeros(pt.size),
                        True,
                    )
                )
                continue
            s = REL_ERR * true[j]
            n = true[j] + (s * rng.standard_normal(pt.size) if noise else 0.0)
            dens[t, j, ok], err[t, j, ok] = n, s
            if j == interpolant_width:
                params = forms.pack_interpolant(pt, true[j])
                k = pt.size
                row.append(
                    FitRecord(
                        "monotone_interpolant",
                        params,
                        np.diag(np.concatenate([np.zeros(k), s**2, np.full(k, np.nan)])),
                        float(np.sum(((n - true[j]) / s) ** 2)),
                        0,
                        np.nan,
                        np.nan,
                        np.nan,
                        (n - true[j]) / s,
                        False,
                    )
                )
                continue
            row.append(_fit_record(pt, n, s, None if noise else (n_m[j], b[j])))
        fits.append(row)
    points = {
        "adsorption": {
            "density_per_nm3": dens,
            "density_per_nm3_stderr": err,
            "excess_density_per_nm3": dens - bulk[:, None, :],
            "molecules_mean": dens * 27.0,
            "molecules_stderr": err * 27.0,
            "isosteric_heat_kJ_per_mol": 9.0 + rng.random(shape),
            "isosteric_heat_kJ_per_mol_stderr": 0.1 * rng.random(shape),
            "fluid_fluid_energy_kJ_per_mol": -rng.random(shape),
            "fluid_solid_energy_kJ_per_mol": -5.0 - rng.random(shape),
            "statistical_inefficiency": 1.0 + 10 * rng.random(shape),
            "drift_z": rng.standard_normal(shape),
            "replica_agreement_z": rng.standard_normal(shape),
            "insertion_acceptance": rng.random(shape),
            "insertion_trials": np.ones(shape),
            "moves": np.full(shape, 1e6),
            "seconds": rng.random(shape),
            "converged": rng.random(shape) > 0.05,
        }
    }
    desorption = {
        k: np.where(np.arange(n_p) >= n_p // 2, v, np.nan if v.dtype != bool else v)
        for k, v in points["adsorption"].items()
        if k != "converged"
    }
    points["desorption"] = desorption
    flag_choices = np.array(
        ["", "", "", "", "drift: z = 3.1", "replicas_disagree[1]: z = 4; drift: z = 3", "no_stderr"]
    )
    flags = {b: flag_choices[rng.integers(0, flag_choices.size, shape)] for b in points}
    dense_p = np.tile(np.geomspace(1e2, 1e7, 30), (n_t, 1))
    dense = np.stack([langmuir(h, temp, dense_p[t]) for t, temp in enumerate(temps)])
    config = f"# invented demo config\nname = '{name}'\nseed = {seed}\nversion = {version}\n"
    return KernelData(
        name=name,
        version=version,
        probe={
            "name": "demo-probe",
            "epsilon_k": 120.0,
            "sigma_nm": 0.34,
            "reference_eos": None,
            "source": "invented for a format test",
            "aliases": ["dp", "demo"],
        },
        solid={
            "name": "graphite",
            "rho_s_per_nm3": 114.0,
            "delta_nm": 0.335,
            "epsilon_k": 28.0,
            "sigma_nm": 0.34,
            "epsilon_sf_scale": 1.0,
        },
        cutoff_nm=1.7,
        box_nm=3.6,
        tail_correction="slab",
        eos="ideal",
        eos_parameters={"note": "ideal gas", "critical": {"T_K": 150.7, "p_Pa": 4.86e6}},
        width_convention="internal: w = H - sigma_ss",
        pore_volume_convention="A * w",
        sampler="gcmc-ladder",
        temperatures_K=temps,
        widths_H_nm=h,
        widths_w_nm=w,
        pressures_Pa=p,
        relative_pressures=np.full(p.shape, np.nan),
        saturation_pressures_Pa=np.full(n_t, np.nan),
        fugacities_Pa=p.copy(),
        bulk_density_per_nm3=bulk,
        points=points,
        flags=flags,
        henry_per_nm3_per_pa=henry,
        accessible=np.broadcast_to(np.arange(n_w) > 0, (n_t, n_w)).copy(),
        fits=fits,
        above_range=above_range,
        dense_pressures_Pa=dense_p,
        dense_density_per_nm3=dense,
        config_text=config,
        provenance={
            "created": "2024-06-11T09:30:00+00:00",
            "code_version": "gcmc 0.1.0",
            "host": "demo-host",
            "config_hash": config_hash(config),
            "library_versions": {"numpy": np.__version__, "h5py": h5py.__version__},
            "seed": seed,
        },
        task_seeds=rng.integers(0, 2**64 - 1, size=(n_t, n_w), dtype=np.uint64, endpoint=True),
        task_seconds=10 * rng.random((n_t, n_w)),
        extra={"demo_table": np.arange(6.0).reshape(2, 3), "demo_labels": np.array(["a", "b"])},
    )


def assert_same(a: object, b: object, where: str = "") -> None:
    if isinstance(a, KernelData) or isinstance(a, FitRecord):
        assert type(a) is type(b), where
        for f in dataclasses.fields(a):
            assert_same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
    elif isinstance(a, dict):
        assert isinstance(b, dict) and list(a) == list(b), where
        for k in a:
            assert_same(a[k], b[k], f"{where}[{k!r}]")
    elif isinstance(a, list | tuple):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            assert_same(x, y, f"{where}[{i}]")
    elif isinstance(a, np.ndarray):
        bb = np.asarray(b)
        assert bb.shape == a.shape, where
        if a.dtype.kind in "OUS":
            assert a.astype(str).tolist() == bb.astype(str).tolist(), where
        else:
            assert bb.dtype.kind == a.dtype.kind or a.dtype.kind in "iu", where
            np.testing.assert_array_equal(bb, a, err_msg=where)
    elif isinstance(a, float) and np.isnan(a):
        assert isinstance(b, float) and np.isnan(b), where
    else:
        assert a == b and type(a) is type(b), f"{where}: {a!r} != {b!r}"


@pytest.fixture(scope="module")
def demo() -> KernelData:
    return make_kernel()


@pytest.fixture(scope="module")
def exact() -> KernelData:
    return make_kernel(name="demo-exact", noise=False)


@pytest.fixture()
def written(tmp_path: Path, demo: KernelData) -> Path:
    return write_kernel(demo, tmp_path)


# --------------------------------------------------------------------------------------------
# writing and reading back
# --------------------------------------------------------------------------------------------
def test_round_trip_all_fields(written: Path, demo: KernelData) -> None:
    assert written.name == "demo-kernel.v1.h5"
    k = open_kernel(written)
    assert_same(demo, k.data, "data")
    assert (k.name, k.version, k.schema_version) == ("demo-kernel", 1, "1.0")
    np.testing.assert_array_equal(k.temperatures_K, demo.temperatures_K)
    np.testing.assert_array_equal(k.widths_H_nm, demo.widths_H_nm)
    np.testing.assert_array_equal(k.widths_w_nm, demo.widths_w_nm)
    np.testing.assert_array_equal(k.pressures_Pa(1), demo.pressures_Pa[1, :-1])
    np.testing.assert_array_equal(k.pressures_Pa(200.0), demo.pressures_Pa[1, :-1])
    assert [p.name for p in written.parent.iterdir()] == [written.name]  # no temp files left


def test_layout_dimension_scales_and_units(written: Path) -> None:
    with h5py.File(written, "r") as f:
        assert f.attrs["schema_version"] == "1.0"
        ds = f["points/adsorption/density_per_nm3"]
        assert ds.attrs["units"] == "nm^-3"
        assert [s.name for s in ds.dims[0].values()] == ["/axes/temperature_K"]
        assert [s.name for s in ds.dims[1].values()] == ["/axes/width_H_nm", "/axes/width_w_nm"]
        assert [s.name for s in ds.dims[2].values()] == ["/axes/pressure_index"]
        assert f["axes/temperature_K"].attrs["units"] == "K"
        assert f["axes/width_w_nm"].is_scale
        assert f["fits/parameters"].shape == (2, 10, 42)  # the interpolant: 3 x 14 knots
        assert f["fits"].attrs["above_range"] == "clamp"
        assert h5py.check_string_dtype(f["points/desorption/flags"].dtype).length is None
        assert f["limits/smallest_accessible_width_H_nm"][0] == pytest.approx(0.55)
        for group in f:
            assert len(f[group].attrs["checksum_sha256"]) == 64
        root, groups = compute_checksums(f)
        assert f.attrs["checksum_sha256"] == root
        assert groups["/points"] == f["points"].attrs["checksum_sha256"]


def test_refuses_to_overwrite(written: Path, demo: KernelData) -> None:
    before = written.read_bytes()
    with pytest.raises(InputError, match="never overwritten"):
        write_kernel(demo, written.parent)
    assert written.read_bytes() == before
    assert sorted(p.name for p in written.parent.iterdir()) == [written.name]


def test_invalid_data_and_failed_write_leave_nothing(
    tmp_path: Path, demo: KernelData, monkeypatch: pytest.MonkeyPatch
) -> None:
    bad = dataclasses.replace(demo, widths_H_nm=demo.widths_H_nm[::-1])
    with pytest.raises(InputError, match="widths_H_nm"):
        write_kernel(bad, tmp_path)
    bad = dataclasses.replace(demo, above_range="extrapolate")
    with pytest.raises(InputError, match="above_range"):
        write_kernel(bad, tmp_path)
    import gcmc.kernel.writer as library

    def explode(f: h5py.File, data: KernelData) -> None:
        f.create_dataset("half", data=np.zeros(10))
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(library, "_write_contents", explode)
    with pytest.raises(InputError, match="cannot write"):
        write_kernel(demo, tmp_path)
    assert list(tmp_path.iterdir()) == []


def test_next_version(tmp_path: Path, demo: KernelData) -> None:
    h1 = demo.provenance["config_hash"]
    assert next_version(tmp_path, "demo-kernel", h1) == (1, None)
    p1 = write_kernel(demo, tmp_path)
    assert next_version(tmp_path, "demo-kernel", h1) == (1, p1)  # rerun: reuse
    changed = make_kernel(version=2, seed=7)  # a changed config
    h2 = changed.provenance["config_hash"]
    assert h2 != h1
    assert next_version(tmp_path, "demo-kernel", h2) == (2, None)
    p2 = write_kernel(changed, tmp_path)
    assert next_version(tmp_path, "demo-kernel", h2) == (2, p2)
    assert next_version(tmp_path, "demo-kernel", h1) == (1, p1)
    assert next_version(tmp_path, "demo-kernel", "0" * 64) == (3, None)
    assert next_version(tmp_path, "other", h1) == (1, None)
    assert list(list_versions(tmp_path, "demo-kernel")) == [1, 2]
    # a damaged file with the matching config is not silently rebuilt or reused
    _flip(p1, _data_offset(p1, "points/adsorption/density_per_nm3") + 3)
    with pytest.raises(InputError, match="fails verification"):
        next_version(tmp_path, "demo-kernel", h1)


# --------------------------------------------------------------------------------------------
# damaged files
# --------------------------------------------------------------------------------------------
def _data_offset(path: Path, name: str) -> int:
    with h5py.File(path, "r") as f:
        offset = f[name].id.get_offset()
    assert offset is not None
    return int(offset)


def _flip(path: Path, offset: int) -> None:
    raw = bytearray(path.read_bytes())
    raw[offset] ^= 0x10
    path.write_bytes(bytes(raw))


def test_flipped_data_byte_is_refused(written: Path) -> None:
    _flip(written, _data_offset(written, "points/adsorption/density_per_nm3") + 101)
    with pytest.raises(InputError, match=r"checksum mismatch \(damaged: /points\)") as exc:
        open_kernel(written)
    assert str(written) in str(exc.value) and "\n" not in str(exc.value)


def test_no_flipped_byte_goes_unnoticed(tmp_path: Path) -> None:
    """Flip bytes spread over the whole file: each is refused with an InputError, or the file
    reads back identical (the byte was unused space inside the file)."""
    small = make_kernel(n_w=4, n_p=6, interpolant_width=None)
    path = write_kernel(small, tmp_path)
    pristine = path.read_bytes()
    refused = 0
    for offset in np.linspace(0, len(pristine) - 1, 60).astype(int):
        raw = bytearray(pristine)
        raw[offset] ^= 0x01
        path.write_bytes(bytes(raw))
        try:
            k = open_kernel(path)
        except InputError as exc:
            assert "\n" not in str(exc)
            refused += 1
            continue
        assert_same(small, k.data, f"offset {offset}")
    # most of a kernel file is data and checksummed metadata (about 85 % of offsets were
    # refused when this test was written); half is a loose floor against a silent regression
    assert refused > 30


def test_edited_attribute_is_refused(written: Path) -> None:
    """A valid HDF5 edit (no damage for HDF5 to see) of a model attribute is caught by the
    kernel's own checksum, naming the group."""
    with h5py.File(written, "r+") as f:
        f["model/probe"].attrs["epsilon_k"] = 121.0
    with pytest.raises(InputError, match=r"checksum mismatch \(damaged: /model\)"):
        open_kernel(written)


def test_truncated_file_is_refused(written: Path) -> None:
    raw = written.read_bytes()
    written.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(InputError, match="truncated or damaged") as exc:
        open_kernel(written)
    assert str(written) in str(exc.value) and "\n" not in str(exc.value)


def test_unknown_major_schema_is_refused_and_newer_minor_is_read(written: Path) -> None:
    def restamp(version: str) -> None:
        with h5py.File(written, "r+") as f:
            f.attrs["schema_version"] = version
            f.attrs["checksum_sha256"] = compute_checksums(f)[0]

    restamp("1.3")  # a newer minor version only adds content: readable
    assert open_kernel(written).schema_version == "1.3"
    restamp("2.0")
    with pytest.raises(InputError, match="schema version 2.0 is not supported") as exc:
        open_kernel(written)
    assert str(written) in str(exc.value)


def test_reader_needs_neither_numba_nor_scipy() -> None:
    code = (
        "import sys, gcmc.reader; bad = [m for m in ('numba', 'scipy') if m in sys.modules];"
        " print(','.join(bad))"
    )
    out = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        cwd=Path(__file__).resolve().parents[1],
    )
    assert out.stdout.strip() == ""


# --------------------------------------------------------------------------------------------
# evaluation
# --------------------------------------------------------------------------------------------
def _langmuir_sigma(fit: FitRecord, p: np.ndarray) -> np.ndarray:
    """Standard error of the fitted Langmuir curve, propagated from the fit covariance."""
    n_m, b = fit.parameters
    g = np.stack([b * p / (1 + b * p), n_m * p / (1 + b * p) ** 2])  # (2, P)
    return np.sqrt(np.einsum("ip,ij,jp->p", g, fit.covariance, g))


def test_evaluate_matches_generating_langmuir_within_fit_error(
    written: Path, demo: KernelData
) -> None:
    k = open_kernel(written)
    for t, temp in enumerate(demo.temperatures_K):
        p = np.geomspace(k.pressures_Pa(t)[0], k.pressures_Pa(t)[-1], 40)
        m = k.evaluate(p, demo.widths_w_nm, temp)
        assert m.shape == (40, demo.widths_w_nm.size)
        true = langmuir(demo.widths_H_nm, temp, p).T
        for j, fit in enumerate(demo.fits[t]):
            if fit.form != "langmuir":
                continue
            # 5 standard errors of the fitted curve: a Gaussian tail of ~6e-7 per point
            tol = 5.0 * _langmuir_sigma(fit, p)
            assert np.all(np.abs(m[:, j] - true[:, j]) <= tol), (t, j)
        np.testing.assert_array_equal(m[:, 0], 0.0)  # the inaccessible pore
        # the monotone interpolant goes through its knots (the noise-free data)
        j = 4
        knots = k.pressures_Pa(t)
        np.testing.assert_allclose(
            k.evaluate(knots, [demo.widths_w_nm[j]], temp)[:, 0],
            langmuir(demo.widths_H_nm[j], temp, knots)[0],
            rtol=1e-12,
        )
        assert np.all(np.diff(k.evaluate(p, [demo.widths_w_nm[j]], temp)[:, 0]) >= 0)


def test_henry_extension_below_the_simulated_range(tmp_path: Path, exact: KernelData) -> None:
    k = open_kernel(write_kernel(exact, tmp_path))
    temp = 150.0
    p_low = k.pressures_Pa(0)[0]
    p = np.geomspace(p_low * 1e-6, p_low, 25)
    cols = np.arange(1, exact.widths_H_nm.size)
    cols = cols[cols != 4]
    m = k.evaluate(p, exact.widths_H_nm[cols], temp, width_axis="H")
    n_m, b = langmuir_constants(exact.widths_H_nm[cols], temp)
    true = (n_m * b * p[:, None]) / (1 + b * p[:, None])
    # n_ext/n_true = (1 + b p)(1 + b p_low)^(-p/p_low) lies in [1, 1 + b p_low] for
    # 0 <= p <= p_low (concavity of ln(1 + b p) in p); rounding adds ~1e-14.
    ratio = m / true
    assert np.all(ratio >= 1 - 1e-12)
    assert np.all(ratio <= 1 + b * p_low + 1e-12)
    # the exact Henry law as p -> 0 (K_H = n_m b for a Langmuir isotherm)
    np.testing.assert_allclose(m[0] / p[0], n_m * b, rtol=2 * (b * p[0]).max() + 1e-12)
    assert np.all(k.evaluate([0.0], exact.widths_w_nm, temp) == 0.0)


def test_width_interpolation_is_linear_and_bounded(tmp_path: Path, exact: KernelData) -> None:
    k = open_kernel(write_kernel(exact, tmp_path))
    temp = 200.0
    h = exact.widths_H_nm
    p = k.pressures_Pa(temp)
    j = 6  # between two Langmuir pores
    mid = 0.5 * (h[j] + h[j + 1])
    got = k.evaluate(p, [mid], temp, width_axis="H")[:, 0]
    ends = k.evaluate(p, [h[j], h[j + 1]], temp, width_axis="H")
    np.testing.assert_allclose(got, ends.mean(axis=1), rtol=1e-14)
    # linear interpolation error <= (dh^2/8) max |d^2 n/dH^2| on the interval (Taylor bound);
    # the second derivative is taken by central differences on a fine grid (its own error
    # is O(1e-6) relative) with a 10 % margin
    fine = np.linspace(h[j], h[j + 1], 201)
    step = 1e-4
    d2 = (
        langmuir(fine + step, temp, p)
        - 2 * langmuir(fine, temp, p)
        + langmuir(fine - step, temp, p)
    ) / step**2
    bound = (h[j + 1] - h[j]) ** 2 / 8 * np.abs(d2).max(axis=0) * 1.1 + 1e-12
    assert np.all(np.abs(got - langmuir(mid, temp, p)[0]) <= bound)
    # the w axis is the H axis shifted by sigma_ss
    np.testing.assert_allclose(
        k.evaluate(p, [mid - SIGMA_SS], temp, width_axis="w")[:, 0], got, rtol=1e-13
    )


def test_excess_above_range_and_bad_requests(tmp_path: Path, exact: KernelData) -> None:
    k = open_kernel(write_kernel(exact, tmp_path))
    temp = 150.0
    p = k.pressures_Pa(temp)
    w = exact.widths_w_nm
    ab = k.evaluate(p, w, temp)
    ex = k.evaluate(p, w, temp, quantity="excess")
    np.testing.assert_allclose(
        ex, ab - exact.bulk_density_per_nm3[0][:, None], rtol=1e-12, atol=1e-12 * np.abs(ab).max()
    )
    # at the simulated points the excess equals the stored excess of the data, within the
    # fit's error (the data carry 1 % errors: 5 sigma of a point)
    sel = [1, 2, 3, 5]
    stored = exact.points["adsorption"]["excess_density_per_nm3"][0][sel].T
    assert np.all(np.abs(ex[:, sel] - stored) <= 5 * REL_ERR * ab[:, sel])
    # between stored pressures the ideal-gas bulk density is linear in p: ln-ln interpolation
    # reproduces it exactly (slope 1), also below the grid (rho proportional to p)
    q = np.array([p[0] * 1e-3, np.sqrt(p[2] * p[3])])
    rho = q / (K_B * temp) / 1e27
    np.testing.assert_allclose(k.bulk_density(q, temp), rho, rtol=1e-12)
    # above the highest pressure: the stored policy (clamp)
    above = k.evaluate([p[-1], 10 * p[-1]], w, temp)
    np.testing.assert_array_equal(above[0], above[1])
    refuse = dataclasses.replace(exact, name="demo-refuse", above_range="refuse")
    kr = open_kernel(write_kernel(refuse, tmp_path))
    assert np.all(np.isnan(kr.evaluate([10 * p[-1]], w[1:], temp)))
    with pytest.raises(InputError, match="outside the kernel's w range"):
        k.evaluate(p, [w[-1] + 0.01], temp)
    with pytest.raises(InputError, match=r"150, 200 K"):
        k.evaluate(p, w, 175.0)
    assert k.evaluate(p, w, 150.0 * (1 + 1e-12)).shape == (p.size, w.size)
    with pytest.raises(InputError, match="pressures_Pa"):
        k.evaluate([-1.0], w, temp)


def test_evaluation_cache_returns_identical_results(written: Path) -> None:
    k = open_kernel(written)
    p = np.geomspace(1e2, 1e7, 200)
    widths = np.linspace(0.3, 1.2, 100)
    first = k.evaluate(p, widths, 150.0)
    np.testing.assert_array_equal(k.evaluate(p, widths, 150.0), first)
    fresh = open_kernel(written).evaluate(p, widths[::-1], 150.0)
    np.testing.assert_array_equal(fresh, first[:, ::-1])


# --------------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------------
def test_cli_show(written: Path, demo: KernelData, capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["show", str(written)]) == 0
    out = capsys.readouterr().out
    for text in (
        "demo-kernel  version 1  (schema 1.0)",
        "demo-probe",
        "eos         ideal",
        "langmuir",
        "monotone_interpolant",
        "worst reduced chi2",
        "demo-host",
        "2024-06-11T09:30:00+00:00",
        "gcmc 0.1.0",
        "slab",
        "A * w",
    ):
        assert text in out, text
    # flag kinds are counted over the simulated points ("; "-joined flags, kind before ":")
    sim = np.isfinite(demo.points["adsorption"]["density_per_nm3"])
    f = demo.flags["adsorption"][sim]
    drift = sum(str(x).count("drift") for x in f)
    flagged = int(np.count_nonzero(f != ""))
    line = next(x for x in out.splitlines() if "adsorption:" in x)
    assert f"{int(sim.sum())} simulated, {flagged} flagged (" in line
    assert f"drift {drift}" in line and "replicas_disagree " in line
    raw = written.read_bytes()
    written.write_bytes(raw[:1000])
    assert cli.main(["show", str(written)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("gcmc show: error:") and "\n" not in err


def test_export_csv_round_trip(written: Path, demo: KernelData, tmp_path: Path) -> None:
    out = tmp_path / "out" / "kernel.csv"
    out.parent.mkdir()
    assert cli.main(["export", str(written), "--format", "csv", "--output", str(out)]) == 0
    with out.open() as fh:
        rows = list(csv.DictReader(fh))
    ads = [r for r in rows if r["branch"] == "adsorption"]
    n_finite_p = int(np.isfinite(demo.pressures_Pa).sum())
    assert len(ads) == n_finite_p * demo.widths_H_nm.size
    pts = demo.points["adsorption"]
    for r in ads[::7]:
        t = int(np.flatnonzero(np.isclose(demo.temperatures_K, float(r["temperature_K"])))[0])
        w = int(np.flatnonzero(np.isclose(demo.widths_H_nm, float(r["width_H_nm"])))[0])
        i = int(np.flatnonzero(np.isclose(demo.pressures_Pa[t], float(r["pressure_Pa"])))[0])
        # numbers as a person reads them: 12 significant digits (rounding <= 5e-12 relative)
        assert float(r["width_w_nm"]) == pytest.approx(demo.widths_w_nm[w], rel=5e-12)
        for name in (
            "density_per_nm3",
            "density_per_nm3_stderr",
            "excess_density_per_nm3",
            "isosteric_heat_kJ_per_mol",
        ):
            assert float(r[name]) == pytest.approx(pts[name][t, w, i], rel=5e-12, nan_ok=True)
            assert len(r[name].replace("-", "").replace(".", "").lstrip("0").split("e")[0]) <= 12
        assert r["flags"] == demo.flags["adsorption"][t, w, i]
    des = [r for r in rows if r["branch"] == "desorption"]
    assert len(des) == int(np.isfinite(demo.points["desorption"]["density_per_nm3"]).sum())
    # refuses to replace the file without --force
    before = out.read_bytes()
    assert cli.main(["export", str(written), "--format", "csv", "--output", str(out)]) == 2
    assert out.read_bytes() == before
    assert sorted(p.name for p in out.parent.iterdir()) == ["kernel.csv"]


def test_export_npz_round_trip(written: Path, demo: KernelData, tmp_path: Path) -> None:
    out = tmp_path / "kernel.npz"
    assert cli.main(["export", str(written), "--format", "npz", "--output", str(out)]) == 0
    with np.load(out, allow_pickle=False) as z, h5py.File(written, "r") as f:
        # the names are the HDF5 paths: every dataset of the file, and nothing else
        datasets: list[str] = []
        f.visititems(lambda name, obj: datasets.append(name) if hasattr(obj, "dtype") else None)
        assert sorted(set(z.files) - {"attributes_json"}) == sorted(datasets)
        np.testing.assert_array_equal(z["axes/width_w_nm"], demo.widths_w_nm)
        np.testing.assert_array_equal(z["axes/pressure_Pa"], demo.pressures_Pa)
        np.testing.assert_array_equal(
            z["limits/henry_constant_per_nm3_per_Pa"], demo.henry_per_nm3_per_pa
        )
        for fname in POINT_FIELDS:
            np.testing.assert_array_equal(
                z[f"points/adsorption/{fname}"], demo.points["adsorption"][fname]
            )
        assert z["points/desorption/flags"].tolist() == demo.flags["desorption"].tolist()
        assert z["fits/form"][0, 4] == "monotone_interpolant"
        k = int(z["fits/n_parameters"][1, 3])
        np.testing.assert_array_equal(z["fits/parameters"][1, 3, :k], demo.fits[1][3].parameters)
        np.testing.assert_array_equal(z["provenance/task_seeds"], demo.task_seeds)
        attrs = json.loads(str(z["attributes_json"]))
        assert attrs["/"]["name"] == demo.name and attrs["/"]["version"] == demo.version
        assert json.loads(str(z["provenance/provenance_json"])) == demo.provenance
        assert str(z["provenance/config_text"]) == demo.config_text
