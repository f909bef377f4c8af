"""Kernel quality checks (gcmc.quality.criteria), resolving power (gcmc.quality.resolution), the
reference inversion
(gcmc.quality.inversion), the report plots (gcmc.quality.report) and `gcmc check` / `gcmc diff`.

The kernels here are synthetic, invented test data: analytic single-pore isotherms whose
constants vary smoothly with the pore width, "simulated" with a stated relative standard error
(seeded Gaussian noise) and stored with the exact generating parameters as their fits. The
outside references used are named beside each check:
* the Langmuir form and its exact Henry limit K_H = n_m b (I. Langmuir, J. Am. Chem. Soc. 40
  (1918) 1361), and a two-site (dual Langmuir) sum of two such terms;
* the exact Henry constant of a Steele 10-4-3 slit pore by quadrature (gcmc.physics.henry; W.A.
Steele,
  Surf. Sci. 36 (1973) 317) for the methane-like kernel;
* the exact distribution of the number of runs (A. Wald & J. Wolfowitz, Ann. Math. Statist. 11
  (1940) 147), checked against brute-force enumeration;
* "common practice" where stated: methane near room temperature up to ~1 bar does not tell
  slit pores above ~0.9 nm apart.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest
from set_kernels import synthetic_kernel

from gcmc.cli import app as cli
from gcmc.errors import InputError
from gcmc.kernel import flags as fl
from gcmc.kernel.data import KernelData
from gcmc.kernel.reader import Kernel, open_kernel
from gcmc.kernel.writer import write_kernel
from gcmc.physics.units import BOLTZMANN_J_PER_K, MMOL_PER_CM3_PER_NM3, NM3_PER_M3
from gcmc.quality.criteria import (
    CheckSettings,
    SyntheticPSD,
    format_table,
    round_trip,
    run_checks,
    runs_test,
)
from gcmc.quality.diff import diff_kernels, format_diff
from gcmc.quality.inversion import gcv_value, invert, second_difference, solve_nnls_tikhonov
from gcmc.quality.resolution import NoiseModel, resolving_power

T = 298.15
BETA = 1.0 / (BOLTZMANN_J_PER_K * T) / NM3_PER_M3  # ideal-gas density per Pa of pressure, nm^-3
SIGMA_SS = 0.34
REL_ERR = 0.008  # stated relative standard error of the synthetic "simulated" points
PRESSURES = np.geomspace(1e2, 3.5e6, 16)
# widths: one too narrow for the probe, then log-spaced accessible widths
GOOD_WIDTHS = np.round(np.concatenate([[0.2], np.geomspace(0.35, 2.7, 36)]), 4)


# --------------------------------------------------------------------------------------------
# synthetic kernels (invented test data)
# --------------------------------------------------------------------------------------------
def two_site(w: float) -> np.ndarray:
    """A pore as a wall layer plus bulk-like fluid: the fraction phi = 1 - exp(-2 delta / w) of
    the pore volume holds a Langmuir layer (capacity 16 nm^-3, affinity b_s rising in narrow
    pores), the rest a dilute Langmuir term with the ideal-gas Henry law 1/kT, so that wide
    pores approach bulk gas plus a surface excess. Parameters of gcmc.kernel.forms
    "dual_site_langmuir_sips" with s = 1 (two Langmuir terms)."""
    phi = 1.0 - math.exp(-2.0 * 0.35 / w)
    b_s = 2e-6 * (1.0 + (0.8 / w) ** 4)
    n_b = 30.0
    return np.array([phi * 16.0, b_s, (1.0 - phi) * n_b, BETA / n_b, 1.0])


def make_kernel(
    widths_w,
    pressures=PRESSURES,
    params=two_site,
    form="dual_site_langmuir_sips",
    inaccessible=(0,),
    rel_err=REL_ERR,
    seed=1,
    noise=True,
    name="synthetic-test",
    probe="testgas",
) -> KernelData:
    """A KernelData with the exact isotherms of ``params(w)`` as its fits and noisy points
    (built by tests/set_kernels.py, at this module's T and SIGMA_SS)."""
    widths_w = np.asarray(widths_w, float)
    rng = np.random.default_rng(seed)
    return synthetic_kernel(
        widths_w,
        pressures,
        params,
        form,
        [j in inaccessible for j in range(widths_w.size)],
        rel_err,
        rng if noise else None,
        40,
        name,
        probe,
        "# synthetic test kernel (invented)",
        temperature=T,
        solid_sigma=SIGMA_SS,
    )


def drop_widths(data: KernelData, drop: list[int]) -> KernelData:
    keep = np.array([j for j in range(len(data.widths_w_nm)) if j not in drop])
    return dataclasses.replace(
        data,
        widths_H_nm=data.widths_H_nm[keep],
        widths_w_nm=data.widths_w_nm[keep],
        points={b: {f: a[:, keep] for f, a in pts.items()} for b, pts in data.points.items()},
        flags={b: a[:, keep] for b, a in data.flags.items()},
        henry_per_nm3_per_pa=data.henry_per_nm3_per_pa[:, keep],
        accessible=data.accessible[:, keep],
        fits=[[row[j] for j in keep] for row in data.fits],
        dense_density_per_nm3=data.dense_density_per_nm3[:, keep],
        task_seeds=data.task_seeds[:, keep],
        task_seconds=data.task_seconds[:, keep],
    )


def copy_points(data: KernelData) -> KernelData:
    pts = {b: {f: a.copy() for f, a in d.items()} for b, d in data.points.items()}
    return dataclasses.replace(
        data, points=pts, henry_per_nm3_per_pa=data.henry_per_nm3_per_pa.copy()
    )


HEALTH_ONLY = CheckSettings(psds=())  # no round trip: the damaged kernels test the health checks


@pytest.fixture(scope="module")
def good() -> KernelData:
    return make_kernel(GOOD_WIDTHS)


@pytest.fixture(scope="module")
def good_report(good):
    return run_checks(good)


def _j(data: KernelData, w: float) -> int:
    return int(np.argmin(np.abs(data.widths_w_nm - w)))


# --------------------------------------------------------------------------------------------
# a known-good kernel passes; damaged ones fail with the reason named
# --------------------------------------------------------------------------------------------
def test_good_kernel_passes_every_criterion(good_report) -> None:
    bad = [
        (c.key, c.verdict, c.measured)
        for c in good_report.criteria
        if c.verdict not in ("pass", "info")
    ]
    assert bad == []
    assert good_report.verdict == "pass" and good_report.exit_code == 0
    # the synthetic kernel has an inaccessible width first: the smallest accessible is 0.35 nm
    acc = good_report.criterion("accessibility").data["smallest_accessible"][0]
    assert acc["w_nm"] == pytest.approx(0.35)
    # the Henry check judged every accessible width (lowest point at 100 Pa, b p <= 0.02)
    assert good_report.criterion("henry").data["n_skipped"] == 0
    text = format_table(good_report)
    assert "verdict: PASS" in text and "threshold:" in text


def test_noisy_point_fails_as_outlier_and_misfit(good) -> None:
    d = copy_points(good)
    j, k = _j(d, 1.0), 9
    d.points["adsorption"]["density_per_nm3"][0, j, k] *= 1.12  # 15 sigma of the point
    rep = run_checks(d, HEALTH_ONLY)
    out = rep.criterion("width_outliers")
    assert out.verdict == "fail"
    where = f"w = {d.widths_w_nm[j]:.4g} nm"
    assert any(
        where in line and f"p = {d.pressures_Pa[0, k]:.4g} Pa" in line for line in out.details
    )
    assert rep.criterion("fit_quality").verdict == "fail"
    assert rep.exit_code == 1


def test_non_monotonic_isotherm_fails(good) -> None:
    d = copy_points(good)
    j = _j(d, 0.6)
    n = d.points["adsorption"]["density_per_nm3"][0, j]
    n[-1] = n[-2] * 0.95  # a drop of ~5 % = ~4.5 combined sigma at 0.8 % errors
    c = run_checks(d, HEALTH_ONLY).criterion("monotonic")
    assert c.verdict == "fail"
    assert any(f"w = {d.widths_w_nm[j]:.4g} nm" in line for line in c.details)


def test_missing_widths_fail_as_a_gap(good) -> None:
    # take out the widths between 0.5 and 0.8 nm, where the isotherms change fastest
    gone = [j for j, w in enumerate(good.widths_w_nm) if 0.5 < w < 0.8]
    d = drop_widths(good, gone)
    c = run_checks(d, HEALTH_ONLY).criterion("width_gaps")
    assert c.verdict == "fail"
    lo, hi = d.widths_w_nm[gone[0] - 1], d.widths_w_nm[gone[0]]
    assert any(f"refine w in [{lo:.4g}, {hi:.4g}]" in line for line in c.details)
    # and one missing width alone, in the same region
    d1 = drop_widths(good, [_j(good, 0.45)])
    c1 = run_checks(d1, HEALTH_ONLY).criterion("width_gaps")
    assert c1.data["intervals"], "intervals reported"
    worst = max(r["interpolation_error_over_tolerance"] for r in c1.data["intervals"])
    good_worst = max(
        r["interpolation_error_over_tolerance"]
        for r in run_checks(good, HEALTH_ONLY).criterion("width_gaps").data["intervals"]
    )
    # linear interpolation error grows with the square of the interval: doubling it => ~4x
    assert worst > 2.5 * good_worst


def test_wrong_henry_constant_fails(good) -> None:
    d = copy_points(good)
    j = _j(d, 1.5)
    d.henry_per_nm3_per_pa[0, j] *= 1.3
    c = run_checks(d, HEALTH_ONLY).criterion("henry")
    assert c.verdict == "fail"
    assert len(c.details) >= 1 and f"w = {d.widths_w_nm[j]:.4g} nm" in c.details[0]
    assert "exact Henry law" in c.details[0]


def test_unconverged_and_flagged_points(good) -> None:
    d = copy_points(good)
    flags = good.flags["adsorption"].copy()
    drift = fl.flag_text(fl.DRIFT, 0, "first vs second half z = 4.1")
    flags[0, 5, 3] = drift
    d.points["adsorption"]["converged"][0, 5, 3] = False
    flags[0, 7, 2] = fl.flag_text(fl.TARGET_NOT_REACHED, detail="rel. error 0.03 > 0.02")
    d = dataclasses.replace(d, flags={"adsorption": flags})
    c = run_checks(d, HEALTH_ONLY).criterion("point_flags")
    assert c.verdict == "fail" and c.data["n_unconverged"] == 1 and c.data["n_flagged"] == 1
    assert any(line.endswith(drift) for line in c.details)


def test_point_errors_against_target(good) -> None:
    rep = run_checks(good, dataclasses.replace(HEALTH_ONLY, target_rel_stderr=0.005))
    c = rep.criterion("point_errors")
    # stated errors 0.8 % > 0.5 % target but < 3 x target: warn
    assert c.verdict == "warn" and c.data["worst"] == pytest.approx(REL_ERR, rel=0.3)
    d = copy_points(good)
    d.points["adsorption"]["density_per_nm3_stderr"][0, 4, 4] = np.nan
    assert run_checks(d, HEALTH_ONLY).criterion("point_errors").verdict == "fail"


def test_hysteresis_reported(good) -> None:
    d = copy_points(good)
    ads = d.points["adsorption"]
    des = {f: a.copy() for f, a in ads.items()}
    j = _j(d, 1.2)
    des["density_per_nm3"][0, j, 8:12] *= 1.10  # 10 % against sqrt(2) x 0.8 %: ~9 sigma
    d = dataclasses.replace(
        d,
        points={"adsorption": ads, "desorption": des},
        flags={"adsorption": d.flags["adsorption"], "desorption": d.flags["adsorption"].copy()},
    )
    c = run_checks(d, HEALTH_ONLY).criterion("hysteresis")
    assert c.verdict == "warn"
    row = next(r for r in c.data["isotherms"] if abs(r["w_nm"] - d.widths_w_nm[j]) < 1e-9)
    assert row["max_gap_sigma"] > 6 and row["loop_area_mmol_cm3_lnp"] > 0
    des["density_per_nm3"][0, j, 8:12] /= 1.10**2  # desorption below adsorption
    assert run_checks(d, HEALTH_ONLY).criterion("hysteresis").verdict == "fail"


def test_runs_test_matches_enumeration() -> None:
    # exact distribution of the number of runs (Wald & Wolfowitz 1940) against brute force:
    # every distinct arrangement of n1 plus and n2 minus signs is equally likely
    for n1, n2 in ((5, 4), (3, 6), (2, 2)):
        seqs = sorted(set(itertools.permutations([1] * n1 + [-1] * n2)))
        runs = np.array([1 + sum(a != b for a, b in itertools.pairwise(q)) for q in seqs])
        for q, r in zip(seqs, runs, strict=True):
            got = runs_test(np.array(q, dtype=float))
            assert got[:3] == (r, n1, n2)
            assert got[3] == pytest.approx(np.mean(runs <= r), abs=1e-12)
    assert runs_test(np.ones(6))[3] == 1.0  # one sign only: undefined, never flagged


# --------------------------------------------------------------------------------------------
# resolving power: hand calculation on an analytic Langmuir kernel
# --------------------------------------------------------------------------------------------
N0, B0, W0 = 15.0, 1e-6, 0.9  # invented Langmuir constants: n_m = N0 (1 + 0.5 exp(-w/0.5)),


def lang_nm(w):  # b = B0 (1 + (W0/w)^4)
    return N0 * (1.0 + 0.5 * np.exp(-w / 0.5))


def lang_b(w):
    return B0 * (1.0 + (W0 / w) ** 4)


def lang_params(w):
    return np.array([lang_nm(w), lang_b(w)])


def lang_derivatives(w, p):
    """n, dn/dw, d2n/dw2 of the Langmuir kernel in closed form (chain rule on n_m(w), b(w))."""
    nm, b = lang_nm(w), lang_b(w)
    nm1 = -N0 * 0.5 * np.exp(-w / 0.5) / 0.5
    nm2 = N0 * 0.5 * np.exp(-w / 0.5) / 0.25
    b1 = B0 * (-4.0) * W0**4 / w**5
    b2 = B0 * 20.0 * W0**4 / w**6
    x = b * p
    th = x / (1 + x)  # n = nm th(b)
    th_b = p / (1 + x) ** 2  # d th / d b
    th_bb = -2 * p * p / (1 + x) ** 3  # d2 th / d b2
    n = nm * th
    d1 = nm1 * th + nm * th_b * b1
    d2 = nm2 * th + 2 * nm1 * th_b * b1 + nm * (th_bb * b1 * b1 + th_b * b2)
    return n, d1, d2


def hand_resolution(w, p, noise, chi2=1.0):
    """dw_1 and dw_2 by the formulas of gcmc.quality.resolution, written out: projections of the
    noise-weighted closed-form derivatives."""
    n, d1, d2 = (x * MMOL_PER_CM3_PER_NM3 for x in lang_derivatives(w, p))
    s = np.sqrt((noise.relative * n) ** 2 + noise.absolute_mmol_cm3**2)
    u, g1, g2 = n / s, d1 / s, d2 / s
    perp1 = g1 - (g1 @ u) / (u @ u) * u
    basis = np.stack([u, g1], axis=1)
    coef, *_ = np.linalg.lstsq(basis, g2, rcond=None)
    perp2 = g2 - basis @ coef
    return math.sqrt(chi2) / np.linalg.norm(perp1), math.sqrt(
        2 * math.sqrt(chi2) / np.linalg.norm(perp2)
    )


def analytic_kernel(h: float) -> Kernel:
    w = np.round(np.arange(0.4, 2.0 + 1e-9, h), 6)
    return Kernel(
        make_kernel(
            w,
            np.geomspace(1e3, 1e6, 20),
            params=lang_params,
            form="langmuir",
            inaccessible=(),
            noise=False,
        )
    )


def test_resolving_power_matches_hand_calculation() -> None:
    noise = NoiseModel(0.01, 0.01)
    p = np.geomspace(1e3, 1e6, 20)
    probe_w = [0.6, 0.9, 1.2, 1.5]
    errors = {}
    for h in (0.02, 0.01):
        k = analytic_kernel(h)
        r = resolving_power(k, T, noise=noise)
        for w in probe_w:
            j = int(np.argmin(np.abs(r.widths_w_nm - w)))
            d1, d2 = hand_resolution(r.widths_w_nm[j], p, noise)
            errors[(h, w)] = (r.single_step_nm[j] / d1 - 1, r.pair_half_separation_nm[j] / d2 - 1)
    for w in probe_w:
        e_h, e_h2 = np.abs(errors[(0.02, w)]), np.abs(errors[(0.01, w)])
        # the kernel's derivatives are second-order finite differences of its node isotherms:
        # the deviation from the closed form falls ~4x when the width step halves ...
        assert np.all((e_h2 < 0.4 * e_h) | (e_h2 < 1e-6)), (w, e_h, e_h2)
        # ... and at h = 0.01 nm it is below 0.5 % (truncation ~ (h/w)^2 x O(10) here)
        assert np.all(e_h2 < 5e-3), (w, e_h2)


def test_more_pressures_never_resolve_worse() -> None:
    # exact: dw_1, dw_2 are inverse norms of residuals of least-squares projections; adding
    # rows (pressures) cannot decrease a minimum of a sum of squares
    k = analytic_kernel(0.02)
    few = np.geomspace(1e3, 1e5, 8)
    many = np.unique(np.concatenate([few, np.geomspace(1e3, 1e6, 17)]))
    a = resolving_power(k, T, few)
    b = resolving_power(k, T, many)
    assert np.all(b.single_step_nm <= a.single_step_nm * (1 + 1e-9))
    assert np.all(b.pair_half_separation_nm <= a.pair_half_separation_nm * (1 + 1e-9))
    with pytest.raises(InputError, match="above the kernel's highest simulated pressure"):
        resolving_power(k, T, np.array([1e3, 2e6]))


def methane_like_kernel() -> Kernel:
    """Methane-like Langmuir kernel: Henry constants by quadrature of the Steele 10-4-3 slit
    potential for TraPPE methane at 298.15 K (gcmc.physics.henry; an exact limit of the model), a
    capacity of 16 molecules/nm^3 (liquid methane near its boiling point, ~26 mol/L, from
    memory), b = K_H / n_m."""
    from gcmc.physics.henry import pore_limit
    from gcmc.physics.model import SLIT, PoreModel, default_solid, get_probe

    probe, solid = get_probe("methane"), default_solid()
    h = np.round(np.arange(0.66, 2.6 + 1e-9, 0.04), 3)
    kh = np.array(
        [
            pore_limit(
                PoreModel(
                    probe=probe, solid=solid, geometry=SLIT, cutoff_nm=1.2, box_nm=3.0, width_nm=x
                ),
                T,
            ).henry_per_nm3_per_pa
            for x in h
        ]
    )
    w = h - solid.sigma_nm

    def params(x):
        return np.array([16.0, float(np.interp(x, w, kh)) / 16.0])

    return Kernel(
        make_kernel(
            w,
            np.geomspace(1e3, 3.5e6, 30),
            params=params,
            form="langmuir",
            inaccessible=(),
            noise=False,
            name="methane-like",
            probe="methane",
        )
    )


def test_methane_room_temperature_one_bar_limit() -> None:
    # common practice: methane near room temperature up to ~1 bar cannot tell apart slit pores
    # above ~0.9 nm. The statement is loose (which width, what noise), so the band is wide.
    k = methane_like_kernel()
    p_all = k.pressures_Pa(T)
    r1 = resolving_power(k, T, p_all[p_all <= 1.0001e5], NoiseModel(0.01, 0.01))
    assert not r1.all_resolved and not r1.none_resolved
    assert 0.7 <= r1.limit_H_nm <= 1.1, r1.summary()
    # up to 35 bar the same kernel resolves much wider pores (more pressures: never worse)
    r35 = resolving_power(k, T, p_all, NoiseModel(0.01, 0.01))
    assert r35.all_resolved or r35.limit_w_nm > r1.limit_w_nm + 0.2
    assert r35.n_significant > r1.n_significant


# --------------------------------------------------------------------------------------------
# the reference inversion and the round trip
# --------------------------------------------------------------------------------------------
def test_gcv_trace_against_svd_and_exact_recovery() -> None:
    rng = np.random.default_rng(3)
    a = np.abs(rng.normal(size=(30, 12)))
    f_true = np.abs(rng.normal(size=12))
    b = a @ f_true
    op = second_difference(12)
    # no noise, negligible lambda, full column rank: NNLS returns the truth (to rounding)
    f = solve_nnls_tikhonov(a, b, 1e-10, op)
    assert np.allclose(f, f_true, rtol=1e-6, atol=1e-8)
    # GCV with the free-set influence matrix, against an independent SVD of the stacked system
    bn = b + 0.05 * rng.normal(size=30)
    for lam in (1e-2, 1.0, 10.0):
        f = solve_nnls_tikhonov(a, bn, lam, op)
        free = f > 1e-12 * f.max()
        s = np.vstack([a[:, free], lam * op[:, free]])
        _, sv, vt = np.linalg.svd(s, full_matrices=False)
        g = (a[:, free] @ vt.T) / sv
        res = a @ f - bn
        ref = 30 * (res @ res) / (30 - np.sum(g * g)) ** 2
        assert gcv_value(a, bn, f, lam, op) == pytest.approx(ref, rel=1e-9)
    for method in ("gcv", "l-curve"):
        inv = invert(a, np.linspace(0.4, 1.5, 12), bn, np.full(30, 0.05), method=method)
        assert inv.method == method and np.all(inv.psd >= 0) and np.isfinite(inv.lam)
    with pytest.raises(InputError, match="method"):
        invert(a, np.linspace(0.4, 1.5, 12), bn, np.full(30, 0.05), method="magic")


def test_round_trip_recovers_where_resolvable(good_report) -> None:
    trips = {rt.psd.name: rt for rt in good_report.round_trips}
    one = trips["one mode"]
    assert one.resolvable and one.verdict == "pass"
    # stated tolerances of the check: median volume within 15 %, mode within 2 dw_2 + a step
    vol, _ = one.volume_rel_error
    assert abs(vol) <= 0.15
    err, _, found = one.mode_errors()[0]
    assert found > one.recovered.shape[0] / 2 and abs(err) <= one.mode_tolerances[0]
    # the invented sample's broad mode lies above the resolved limit: said so, not judged
    sample = trips["Larchmere LSL-7 carbon (invented)"]
    assert not sample.resolvable and "above the resolved limit" in sample.why
    assert sample.verdict == "info"
    lines = good_report.criterion("round_trip").details
    assert any("not resolvable" in line for line in lines)


def test_round_trip_of_a_mode_beyond_the_limit_is_not_judged(good) -> None:
    k = Kernel(good)
    r = resolving_power(k, T)
    psd = SyntheticPSD("wide", ((2.2, 0.25, 1.0),))
    rt = round_trip(k, r, psd, CheckSettings(realisations=4))
    assert not rt.resolvable and rt.verdict == "info" and rt.failures == []
    # a mode inside the resolved range with a tiny noise: recovered closely
    psd = SyntheticPSD("narrow", ((0.6, 0.08, 1.0),))
    rt = round_trip(k, r, psd, CheckSettings(realisations=4, noise=NoiseModel(1e-3, 1e-3)))
    assert rt.resolvable and rt.verdict == "pass"
    assert abs(rt.mode_errors()[0][0]) < 0.03  # a fraction of the 0.06 nm inversion grid step
    assert abs(rt.volume_rel_error[0]) < 0.03


# --------------------------------------------------------------------------------------------
# files, CLI, report, diff
# --------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def good_file(tmp_path_factory, good) -> Path:
    return write_kernel(good, tmp_path_factory.mktemp("kernels"))


def test_cli_check_json_and_report(good_file: Path, tmp_path: Path, capsys) -> None:
    out = tmp_path / "report"
    code = cli.main(
        ["check", str(good_file), "--json", "--report", str(out), "--realisations", "6"]
    )
    captured = capsys.readouterr()
    assert code == 0, captured.err
    data = json.loads(captured.out)
    assert data["verdict"] == "pass"
    keys = [c["key"] for c in data["criteria"]]
    assert keys[:3] == ["point_errors", "point_flags", "monotonic"] and "round_trip" in keys
    for stem in (
        "isotherms_298p15K",
        "relative-errors_298p15K",
        "resolving-power_298p15K",
        "singular-values_298p15K",
        "round-trip_298p15K",
        "overview",
    ):
        for ext in ("png", "pdf"):
            f = out / f"{stem}.{ext}"
            assert f.is_file() and f.stat().st_size > 5000, f
        assert (out / f"{stem}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert (out / f"{stem}.pdf").read_bytes()[:5] == b"%PDF-"
    assert json.loads((out / "check.json").read_text())["verdict"] == "pass"
    assert not list(out.glob(".*tmp"))  # no half-written files left


def test_cli_check_fails_with_exit_1(good, tmp_path: Path, capsys) -> None:
    d = copy_points(good)
    d.henry_per_nm3_per_pa[0, _j(d, 1.5)] *= 1.3
    path = write_kernel(dataclasses.replace(d, name="damaged-henry"), tmp_path)
    assert cli.main(["check", str(path), "--realisations", "2"]) == 1
    text = capsys.readouterr().out
    assert "lowest points vs exact Henry constant" in text and "FAIL" in text


@pytest.mark.parametrize(
    "args, message",
    [
        (["--p-range", "1e4", "1e2"], "--p-range: LOW must be below HIGH"),
        (["--p-range", "1e2", "1e8"], "above the kernel's highest simulated pressure"),
        (["--noise-rel", "-1"], "--noise-rel"),
        (["--temperature", "77"], "77 K is not a temperature"),
        (["--pressures-Pa", "MISSING"], "--pressures-Pa MISSING: cannot read"),
    ],
)
def test_cli_check_bad_input(good_file: Path, args, message, capsys, tmp_path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    assert cli.main(["check", str(good_file), *args]) == 2
    err = capsys.readouterr().err.strip()
    assert message in err and err.count("\n") == 0 and err.startswith("gcmc check: error:")


def test_cli_check_pressure_file(good_file: Path, tmp_path: Path, capsys) -> None:
    bad = tmp_path / "p.txt"
    bad.write_text("# pressures of an invented rig\n1000, 2000\nten\n")
    assert cli.main(["check", str(good_file), "--pressures-Pa", str(bad)]) == 2
    assert f"{bad}: line 3: 'ten' is not a number" in capsys.readouterr().err
    ok = tmp_path / "q.txt"
    ok.write_text("\n".join(f"{x:.6g}" for x in np.geomspace(1e3, 1e5, 12)))
    assert cli.main(
        ["check", str(good_file), "--pressures-Pa", str(ok), "--json", "--realisations", "2"]
    ) in (0, 1)
    res = json.loads(capsys.readouterr().out)
    rp = next(c for c in res["criteria"] if c["key"] == "resolving_power")
    assert len(rp["data"]["temperatures"][0]["pressures_Pa"]) == 12


def test_cli_check_missing_kernel(tmp_path: Path, capsys) -> None:
    assert cli.main(["check", str(tmp_path / "none.h5")]) == 2
    assert "no such kernel file" in capsys.readouterr().err


def test_diff_same_probe(good, good_file: Path, tmp_path: Path, capsys) -> None:
    # identical kernels: nothing changed, deviations zero
    same = diff_kernels(good, good)
    assert same.changes == [] and same.largest() == 0.0 and same.grids_identical
    # a changed model parameter, EOS and a 5 % shift at one width
    d = copy_points(good)
    j = _j(d, 1.0)
    d.points["adsorption"]["density_per_nm3"][0, j] *= 1.05
    d = dataclasses.replace(d, name="synthetic-test-b", cutoff_nm=1.5, eos="peng-robinson")
    rep = diff_kernels(good, d)
    fields = {(s, f) for s, f, _, _ in rep.changes}
    assert ("model", "cutoff_nm") in fields and ("eos", "name") in fields
    row = max(rep.widths, key=lambda r: r.get("max_sigma", 0.0))
    assert row["w_nm"] == pytest.approx(d.widths_w_nm[j])
    assert row["max_sigma"] > 3  # 5 % against sqrt(2) x 0.8 % combined
    # different grids: every other width; B evaluated on A's widths through its fits
    coarse = drop_widths(good, list(range(2, len(good.widths_w_nm), 2)))
    rep2 = diff_kernels(good, coarse)
    assert not rep2.grids_identical and ("grid", "widths_H_nm") in {
        (s, f) for s, f, _, _ in rep2.changes
    }
    assert "interpolated" in rep2.method and "changed" in format_diff(rep2)
    # CLI: exit 1 when a width deviates beyond --max-sigma, 0 when they agree
    path_b = write_kernel(d, tmp_path)
    assert cli.main(["diff", str(good_file), str(path_b)]) == 1
    assert cli.main(["diff", str(good_file), str(good_file), "--json"]) == 0
    capsys.readouterr()


def test_diff_refuses_different_probes(good, tmp_path: Path, capsys) -> None:
    other = dataclasses.replace(
        good, name="other-probe", probe={"name": "argon", "epsilon_k": 120.0, "sigma_nm": 0.34}
    )
    with pytest.raises(InputError, match="diff compares kernels of the same probe"):
        diff_kernels(good, other)
    pa = write_kernel(good, tmp_path)
    pb = write_kernel(other, tmp_path)
    assert cli.main(["diff", str(pa), str(pb)]) == 2
    err = capsys.readouterr().err
    assert "probe 'argon' differs from 'testgas'" in err and err.count("\n") == 1


def test_kernel_roundtrip_through_library_keeps_the_verdict(good_file: Path, good_report) -> None:
    rep = run_checks(open_kernel(good_file), HEALTH_ONLY)
    ours = {c.key: c.verdict for c in rep.criteria if c.key != "round_trip"}
    theirs = {c.key: c.verdict for c in good_report.criteria if c.key != "round_trip"}
    assert ours == theirs


def test_henry_intercept_is_exact_for_langmuir_and_virial_forms() -> None:
    # exact limit: n / (K_H f) -> 1 as f -> 0 for any isotherm that starts on the Henry law;
    # the estimator extrapolates from the two lowest points, linearly in r and in 1/r
    from gcmc.quality.criteria import henry_intercept

    k_h, f = 2e-4, np.array([1.0e3, 2.47e3])
    sig = np.array([1e-4, 1e-4])
    for n in (k_h * f / (1.0 + 1e-4 * f), k_h * f * (1.0 + 1e-4 * f)):  # b f0 = a f0 = 0.1
        est, se, allow, slope = henry_intercept(n, sig, f, k_h)
        # one of the two extrapolations is exact; the other errs by second order in b f
        assert abs(est - 1.0) <= allow + 1e-12 and allow < 0.03
        assert 0.8 < slope < 1.2 and se > 0
    # a Henry constant 5 % off is told apart (the points are the Langmuir ones, exact K_H)
    n = k_h * f / (1.0 + 1e-4 * f)
    est, se, allow, _ = henry_intercept(n, sig, f, 1.05 * k_h)
    assert abs(est - 1.0) > 3 * se + allow
    # no molecules at the lowest point: undefined, not a pass
    assert np.isnan(henry_intercept(np.array([0.0, 1e-3]), sig, f, k_h)[0])


def test_curvature_on_a_dense_noisy_width_axis() -> None:
    """On a dense width axis (0.003 nm, as refinement makes at a pore's opening) the
    three-point curvature of noisy columns is all noise (its variance grows as h^-4); the
    check then takes the least-squares quadratic over 10 % of w. Columns of an exact family
    K = A(p) exp(-w / 0.3) + C(p) with 0.8 % independent noise per width (the kernel's stated
    errors): the returned curvature follows the exact d2K/dw2 (an exact limit) to within a
    few of its own standard errors, where the three-point formula misses it by far more."""
    from gcmc.quality.resolution import curvature, second_derivative

    rng = np.random.default_rng(7)
    w = np.round(np.arange(0.35, 0.6, 0.003), 6)
    a = np.geomspace(5.0, 30.0, 12)[:, None]
    exact = a * np.exp(-w / 0.3) + 2.0
    k_var = (0.008 * exact) ** 2
    k = exact + np.sqrt(k_var) * rng.standard_normal(exact.shape)
    d1 = -a / 0.3 * np.exp(-w / 0.3)
    d2_exact = a / 0.09 * np.exp(-w / 0.3)
    sigma = 0.01 * exact + 0.01
    d2, var2 = curvature(k, w, d1, k_var, sigma)
    inner = slice(12, -12)  # a full window on both sides
    z = (d2 - d2_exact)[:, inner] / np.sqrt(var2[:, inner])
    assert np.sqrt(np.mean(z**2)) < 3.0, np.sqrt(np.mean(z**2))
    rel = np.abs(d2 - d2_exact)[:, inner] / d2_exact[:, inner]
    three, _ = second_derivative(k, w)
    rel3 = np.abs(three - d2_exact)[:, inner] / d2_exact[:, inner]
    assert np.median(rel3) > 5 * np.median(rel), (
        np.median(rel),
        np.median(rel3),
    )
    # noise-free columns keep the three-point formula exactly (it converges as h^2)
    clean, _ = curvature(exact, w, d1, np.zeros_like(exact), sigma)
    assert np.array_equal(clean, second_derivative(exact, w)[0])
