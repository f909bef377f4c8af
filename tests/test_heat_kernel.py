"""The isosteric-heat kernel (gcmc.kernel.heat, gcmc.pipeline.heat): the fit of the per-point
heats across pressure, its storage beside the density kernel, the reader's evaluation, and the
physics check: the heat kernel's zero-loading value against the exact low-pressure limit from
the temperature derivative of the Henry constant (quadrature of the Steele 10-4-3 wall
Boltzmann factor, gcmc.physics.henry; W.A. Steele, Surf. Sci. 36 (1973) 317):
q_st^0 = R d ln K_H / d(1/T) = RT - N_A <V>_Boltzmann, the zero-loading limit of the fluctuation
formula (Nicholson & Parsonage 1982).
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from set_kernels import small

from gcmc.errors import InputError
from gcmc.kernel.heat import HeatKernel, evaluate_heat, validate_heat
from gcmc.kernel.reader import Kernel, open_kernel
from gcmc.kernel.writer import write_kernel
from gcmc.physics.henry import pore_limit, zero_loading_heat_k
from gcmc.physics.model import SLIT, PoreModel, default_solid, get_probe
from gcmc.physics.potentials import wall_potential_k
from gcmc.physics.units import kelvin_to_kj_per_mol
from gcmc.pipeline.heat import fit_heat, heat_kernel


def _pore(h_nm: float, probe: str = "methane") -> PoreModel:
    return PoreModel(
        probe=get_probe(probe),
        solid=default_solid(),
        geometry=SLIT,
        cutoff_nm=1.2,
        box_nm=3.0,
        width_nm=h_nm,
    )


# --------------------------------------------------------------------------------------------
# the exact zero-loading limit: two forms of one quadrature agree
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize(("probe", "t", "h"), [("methane", 298.15, 0.8), ("argon", 87.3, 1.2)])
def test_henry_derivative_equals_kT_minus_mean_wall_energy(probe, t, h) -> None:
    """R d ln K_H / d(1/T) (central differences of the Henry quadrature) against kT - <V> from
    a direct Boltzmann-weighted average of the wall potential (an exact identity for
    K_H = beta int exp(-beta V) dz / w): equal to the quadratures' accuracy (1e-6)."""
    m = _pore(h, probe)
    q_derivative = zero_loading_heat_k(m, t)
    z = np.linspace(0.0, h, 400_001)[1:-1]
    v = wall_potential_k(m, z)
    wgt = np.exp(-(v - v.min()) / t)
    q_direct = t - float(np.sum(v * wgt) / np.sum(wgt))
    assert q_derivative == pytest.approx(q_direct, rel=1e-6)
    assert pore_limit(m, t).accessible


# --------------------------------------------------------------------------------------------
# the fit: coefficients within their covariance
# --------------------------------------------------------------------------------------------
def test_fit_recovers_a_known_heat_curve_within_its_errors() -> None:
    """Synthetic heats on q(n) = 20 + 0.4 n - 0.01 n^2 kJ/mol (invented) with Gaussian errors
    of a stated size, 8 points, so a cubic with dof = 4: the standardised errors
    z = (a_0 - 20)/se of the zero-loading heat over 400 seeded data sets have the mean z^2
    that the covariance scaling max(1, chi2/dof) implies, E[min(1, d/X)] for X ~ chi2_d,
    = F_d(d) + d/(d-2) SF_{d-2}(d) (z and chi2 independent for linear least squares; common
    practice), within 3 of its sampling errors (sd of z^2 at most sqrt(2/400))."""
    rng = np.random.default_rng(5)
    n = np.geomspace(0.05, 8.0, 8)
    true = 20.0 + 0.4 * n - 0.01 * n**2
    s = 0.03 + 0.005 * n
    z2 = []
    for _ in range(400):
        q = true + s * rng.standard_normal(n.size)
        coef, cov, deg, chi2, dof, rng_n = fit_heat(n, q, s)
        assert deg == 3 and dof == n.size - deg - 1
        assert rng_n == (pytest.approx(0.05), pytest.approx(8.0))
        assert stats.chi2.sf(chi2, dof) > 1e-5
        z2.append((coef[0] - 20.0) ** 2 / cov[0, 0])
    d = n.size - 4
    expected = stats.chi2.cdf(d, d) + d / (d - 2) * stats.chi2.sf(d, d - 2)
    assert abs(float(np.mean(z2)) - expected) < 3 * math.sqrt(2.0 / 400)


def test_loading_errors_enter_by_effective_variance() -> None:
    """Heats exact on q = 15 + 0.5 n (invented) at loadings that carry the only error (s_n,
    5 %), fitted by a straight line: with the loadings' errors propagated (effective variance,
    Orear 1982, exact to first order in s_n) chi2/dof averages 1 over 300 seeded sets (within 3
    of its sampling errors, sd sqrt(2/(dof 300))); without them the scatter reads as a misfit."""
    rng = np.random.default_rng(9)
    n_true = np.linspace(0.5, 6.0, 10)
    sn = 0.05 * n_true
    s = np.full(n_true.size, 1e-3)
    with_sn, without = [], []
    for _ in range(300):
        n_obs = n_true + sn * rng.standard_normal(n_true.size)
        q = 15.0 + 0.5 * n_true
        _, _, deg, chi2, dof, _ = fit_heat(n_obs, q, s, sn, max_degree=1)
        with_sn.append(chi2 / dof)
        without.append(fit_heat(n_obs, q, s, max_degree=1)[3] / dof)
    assert abs(float(np.mean(with_sn)) - 1.0) < 3 * math.sqrt(2.0 / (dof * 300))
    assert float(np.mean(without)) > 100.0


def test_fit_without_usable_points_gives_no_heat() -> None:
    coef, cov, deg, *_ = fit_heat(np.array([1.0, 2.0]), np.array([np.nan, 3.0]), np.array([0, 0]))
    assert deg == -1 and np.all(np.isnan(coef)) and np.all(np.isnan(cov))


# --------------------------------------------------------------------------------------------
# storage and the reader
# --------------------------------------------------------------------------------------------
def _with_heat():
    """A synthetic kernel (tests/set_kernels.py) whose points carry heats on a known curve
    q = 18 - 3 w + 0.2 n kJ/mol (invented) with a stated error, and its fitted heat kernel."""
    d = small()
    pts = {k: v.copy() for k, v in d.points["adsorption"].items()}
    n = pts["density_per_nm3"]
    w = d.widths_w_nm[None, :, None]
    q = 18.0 - 3.0 * w + 0.2 * n
    pts["isosteric_heat_kJ_per_mol"] = np.where(d.accessible[:, :, None], q, np.nan)
    pts["isosteric_heat_kJ_per_mol_stderr"] = np.where(
        d.accessible[:, :, None], 0.05 + 0 * n, np.nan
    )
    heat = heat_kernel(
        pts["density_per_nm3"],
        pts["isosteric_heat_kJ_per_mol"],
        pts["isosteric_heat_kJ_per_mol_stderr"],
        d.accessible,
    )
    return dataclasses.replace(d, points={"adsorption": pts}, heat=heat)


def test_heat_kernel_is_stored_and_read_beside_the_density_kernel(tmp_path: Path) -> None:
    d = _with_heat()
    path = write_kernel(d, tmp_path)
    k = open_kernel(path)
    h = k.data.heat
    assert isinstance(h, HeatKernel)
    for f in dataclasses.fields(HeatKernel):
        np.testing.assert_array_equal(getattr(h, f.name), getattr(d.heat, f.name))
    assert np.all(h.degree[~d.accessible] == -1)
    # the heats lie exactly on q = 18 - 3 w + 0.2 n: the fit returns it and the reader
    # evaluates it at the density kernel's loading n(p)
    p = np.geomspace(200.0, 9e5, 7)
    w = d.widths_w_nm[d.accessible[0]][::9]
    q, se = k.isosteric_heat(p, w, 298.15)
    n = k.evaluate(p, w, 298.15)
    np.testing.assert_allclose(q, 18.0 - 3.0 * w[None, :] + 0.2 * n, rtol=1e-9, atol=1e-9)
    assert np.all(np.isfinite(se) & (se > 0) & (se < 0.05))
    a0, s0 = h.zero_loading(0)
    acc = d.accessible[0]
    np.testing.assert_allclose(a0[acc], 18.0 - 3.0 * d.widths_w_nm[acc], atol=1e-9)
    assert np.all(np.isnan(a0[~acc]))


def test_kernel_without_heat_says_so() -> None:
    k = Kernel(small())
    with pytest.raises(InputError, match="no isosteric-heat kernel"):
        k.isosteric_heat([1e3], [1.0], 298.15)


def test_bad_heat_kernel_is_refused_naming_the_field(tmp_path: Path) -> None:
    d = _with_heat()
    bad = dataclasses.replace(d.heat, degree=d.heat.degree[:, :-1])
    with pytest.raises(InputError, match=r"heat\.degree: shape"):
        write_kernel(dataclasses.replace(d, heat=bad), tmp_path)
    assert not list(tmp_path.iterdir())
    with pytest.raises(InputError, match="heat: must be a HeatKernel"):
        validate_heat({"degree": 1}, 1, 1)


def test_evaluate_heat_error_propagation() -> None:
    """var q(n) = v C v^T with v = (1, n): for a diagonal C, var = C00 + n^2 C11."""
    coef = np.array([10.0, 2.0, np.nan, np.nan])
    cov = np.diag([0.04, 0.01, 0.0, 0.0])
    q, se = evaluate_heat(coef, cov, 1, np.array([0.0, 3.0]))
    np.testing.assert_allclose(q, [10.0, 16.0])
    np.testing.assert_allclose(se, [0.2, math.sqrt(0.04 + 9 * 0.01)])


# --------------------------------------------------------------------------------------------
# physics: a built heat kernel against the exact Henry-limit heat
# --------------------------------------------------------------------------------------------
HEAT_CONFIG = """# methane heat-kernel check (test data): two widths, low pressures, ideal bulk gas
seed = 11
[kernel]
name = "heat-methane"
output = "out"
[probe]
library_name = "methane"
[widths]
H_nm = [0.80, 1.20]
[temperatures]
K = [298.15]
[pressures]
from_Pa = 3.0e2
to_Pa = 1.0e5
count = 6
scale = "log"
[eos]
name = "ideal"
[sampling]
equilibration_moves = 20000
production_moves = 200000
sample_every = 20
"""


def test_heat_kernel_reproduces_the_exact_zero_loading_heat(tmp_path: Path, engine) -> None:
    """Methane at 298.15 K in 0.8 and 1.2 nm pores (H), six pressures 300 Pa - 100 kPa: the
    per-point heats (fluctuation formula) fitted across pressure give a zero-loading heat a_0
    within 3 of its standard errors of q_st^0 = R d ln K_H / d(1/T) (exact, by quadrature).
    With an ideal bulk gas the real-gas term is zero; the quadrature's error (1e-6 relative) is
    negligible against the fit's (~1e-3)."""
    from gcmc.pipeline.build import build_kernel

    cfg = tmp_path / "heat.toml"
    cfg.write_text(HEAT_CONFIG)
    res = build_kernel(cfg, workers=1)
    assert res.status == "written", res.status
    k = open_kernel(res.path)
    d = k.data
    a0, se = d.heat.zero_loading(0)
    for j, h_nm in enumerate(d.widths_H_nm):
        exact = kelvin_to_kj_per_mol(
            zero_loading_heat_k(
                PoreModel(
                    probe=get_probe("methane"),
                    solid=default_solid(),
                    geometry=SLIT,
                    cutoff_nm=d.cutoff_nm,
                    box_nm=d.box_nm,
                    width_nm=float(h_nm),
                ),
                298.15,
            )
        )
        assert np.isfinite(se[j]) and 0 < se[j] < 0.01 * exact, (h_nm, se[j])
        assert abs(a0[j] - exact) <= 3.0 * se[j], (h_nm, a0[j], exact, se[j])
    # the heat kernel at the lowest kernel pressure is the polynomial at that loading
    q, e = k.isosteric_heat(d.pressures_Pa[0, :1], d.widths_w_nm, 298.15)
    assert np.all(np.isfinite(q) & np.isfinite(e))
