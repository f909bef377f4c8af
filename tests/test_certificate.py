"""The certificate of a filled point (gcmc.sampling.certificate) and the certified path of
`gcmc point`."""

from __future__ import annotations

import contextlib
import io
import json
import math
from dataclasses import replace
from pathlib import Path

import pytest

from gcmc.kernel import flags as fl
from gcmc.physics.eos import make_eos
from gcmc.physics.model import get_probe
from gcmc.physics.potentials import slit_pore
from gcmc.sampling import certificate as C
from gcmc.sampling.point import PointResult, ThermoState


def _result() -> PointResult:
    nan = math.nan
    return PointResult(
        *([87.3, 1e4, 1e4, 8e-3, "reference", 0.01] + [0.0] * 14 + [1.0, 0, 0.0]),
        replica_means=[0.0],
        replica_stderrs=[0.0],
        replica_agreement_z=0.0,
        acceptance={},
        insertion_trials=1,
        moves=0,
        seconds=nan,
        converged=True,
    )


def _prep(name: str, density: float, **kw) -> C.Preparation:
    base = dict(
        name=name,
        box_nm=(3.4, 3.9),
        molecules_mean=density * 10.0,
        molecules_stderr=0.1,
        molecules_sd=1.0,
        density_per_nm3=density,
        drift_z=0.5,
        drift_passed=True,
        renewals_hot=10,
        exchanges=500,
        renewals=12.0,
        swap_acceptance=[0.3],
        cpu_s=1.0,
        result=_result(),
    )
    base.update(kw)
    return C.Preparation(**base)


def _four(**kw) -> list[C.Preparation]:
    return [
        _prep(n, d, **kw) for n, d in zip(C.PREPARATIONS, (20.0, 20.05, 19.98, 20.02), strict=True)
    ]


def test_required_renewals_from_the_spread_of_n():
    # k >= (d_4 sd / (tol mean))^2: sd 1 % of the mean, tol 1 % -> 2.059^2 = 4.24 -> 5
    p = _prep("below", 100.0, molecules_mean=1000.0, molecules_sd=10.0)
    assert C.required_renewals([p], 0.01) == 5
    # a frozen packing (sd = 0): the floor decides
    assert C.required_renewals([_prep("below", 100.0, molecules_sd=0.0)], 0.01) == 3
    assert C.D2_FOUR == pytest.approx(2.059)  # d_2 for n = 4 (control-chart table value)


def test_agreeing_preparations_are_certified():
    cert = C.judge_preparations(C.CertifySettings(), _four(), _prep("box", 20.01), 10, 1.0)
    assert cert.certified and not cert.flags
    assert cert.result.converged and cert.result.method == "certified-tempering"
    assert cert.density_per_nm3 == pytest.approx(20.0125)
    assert cert.density_spread_rel == pytest.approx(0.07 / 20.0125)


@pytest.mark.parametrize(
    ("change", "flag"),
    [
        ({"preps": [20.0, 20.3, 19.98, 20.02]}, "preparations_disagree"),
        ({"drift": True}, "preparation_drift"),
        ({"renewals": 2.0}, "few_renewals"),
        ({"box": 20.5}, "box_size_disagrees"),
    ],
)
def test_each_failure_stays_flagged_with_its_reason(change, flag):
    dens = change.get("preps", [20.0, 20.05, 19.98, 20.02])
    preps = [_prep(n, d) for n, d in zip(C.PREPARATIONS, dens, strict=True)]
    if change.get("drift"):
        preps[1] = replace(preps[1], drift_passed=False, drift_z=5.0)
    if "renewals" in change:
        preps[2] = replace(preps[2], renewals=change["renewals"])
    boxp = _prep("box", change.get("box", 20.01))
    cert = C.judge_preparations(C.CertifySettings(), preps, boxp, 10, 1.0)
    assert not cert.certified and not cert.result.converged
    assert fl.kinds(cert.flags) == [flag]
    assert fl.lookup(flag) in fl.CERTIFICATE_FLAGS
    assert cert.result.flags == cert.flags


def _argon_state(t: float, x: float):
    probe = get_probe("argon")
    eos = make_eos("reference", probe)
    b = eos.state(t, x * eos.saturation_pressure(t))
    state = ThermoState(
        temperature_K=t,
        fugacity_Pa=b.fugacity_Pa,
        pressure_Pa=b.pressure_Pa,
        bulk_density_per_nm3=b.density_per_nm3,
        eos="reference",
    )
    model = slit_pore(probe, width_nm=1.0215, box_nm=3.41)
    return model, state, eos


def test_short_certification_runs_end_to_end_and_is_honest(engine):
    """A budget far too small for argon at 87.3 K in a 3 sigma pore: every part of the
    certificate is measured, the point is not certified, and the reasons say why."""
    model, state, eos = _argon_state(87.3, 0.1)
    cs = C.CertifySettings(
        equilibration_moves=4_000, production_moves=10_000, hot_rungs=2, budget_cpu_s=0.1
    )
    cert = C.certify_filled_point(model, state, 3, cs, eos)
    assert len(cert.preparations) == 4 and cert.box_check is not None
    assert [p.name for p in cert.preparations] == list(C.PREPARATIONS)
    big, small = cert.box_check.box_nm, cert.preparations[0].box_nm
    assert big[0] * big[1] == pytest.approx(2.0 * small[0] * small[1], rel=0.1)
    assert not cert.certified and cert.flags
    assert fl.has_flag(cert.flags, fl.BUDGET_SPENT)
    assert all(fl.lookup(k) in fl.CERTIFICATE_FLAGS for k in fl.kinds(cert.flags)), cert.flags
    # the stored point carries the same flags, and they parse back one by one
    assert cert.result.flags == cert.flags
    assert fl.kinds(fl.join(cert.result.flags)) == fl.kinds(cert.flags)
    assert cert.result.method == "certified-tempering" and not cert.result.converged
    assert C.is_dense_subcritical(model, 87.3, cert.density_per_nm3)
    assert not C.is_dense_subcritical(model, 160.0, cert.density_per_nm3)  # above T_c


def test_near_critical_points_have_no_certified_step():
    """The hot rungs need room below HOT_MAX_REDUCED_T x T_c: a dense point closer to T_c than
    0.9 / 1.1 T_c is not "dense subcritical" (no certified step), and asking the certificate
    for one is a one-line input error, raised before anything is simulated. T_c of argon
    150.687 K (Tegeler, Span & Wagner 1999, via CoolProp)."""
    from gcmc.errors import InputError

    model, _, eos = _argon_state(87.3, 0.1)
    tc = model.probe.critical_temperature_K
    assert tc == pytest.approx(150.687, abs=0.01)
    dense = 0.8 / model.probe.sigma_nm**3
    edge = C.HOT_MAX_REDUCED_T / C.MIN_HOT_FACTOR * tc
    assert C.is_dense_subcritical(model, 0.99 * edge, dense)
    assert not C.is_dense_subcritical(model, 1.01 * edge, dense)
    assert not C.is_dense_subcritical(model, 0.99 * edge, 0.3 / model.probe.sigma_nm**3)
    near_model, near_state, _ = _argon_state(0.94 * tc, 0.5)
    with pytest.raises(InputError, match="no room for hot rungs"):
        C.certify_filled_point(near_model, near_state, 1, C.CertifySettings(), eos)


def test_dense_point_takes_the_certified_path(engine):
    from gcmc.cli import main

    args = [
        "point", "--probe", "argon", "--temperature", "87.3", "--pressure", "1.0e4",
        "--width", "1.0215", "--moves", "20000", "--certify-moves", "10000",
        "--certify-budget", "0.1", "--json",
    ]  # fmt: skip
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(args) == 0
    d = json.loads(out.getvalue())
    assert d["method"] == "certified-tempering"
    assert d["converged"] is False and d["flags"]  # not certified in this budget, and says so
    assert d["certificate"]["preparations"][0]["name"] == "below"
    assert d["model"]["lateral_box"] == "hexagonal"


@pytest.mark.slow
@pytest.mark.timeout(3600)
@pytest.mark.xfail(
    strict=True,
    reason="measured: at 120 K, p/p0 0.5 the 3 sigma argon pore is still too dense to certify "
    "in 300 CPU s (preparations 22.57-23.15 /nm^3, spread 2.5 %, box -2.0 %); strict, so a "
    "sampler that certifies it makes this test fail and the mark must go",
)
def test_a_mobile_dense_liquid_is_certified(engine):
    """Argon at 120 K (T/T_c = 0.8) in a 3 sigma pore at p/p0 = 0.5: a dense liquid (rho
    sigma^3 > 0.5) that exchanges readily: the certificate must hold within its budget."""
    model, state, eos = _argon_state(120.0, 0.5)
    cs = C.CertifySettings(
        equilibration_moves=50_000,
        production_moves=200_000,
        hot_rungs=3,
        hot_factor=1.1,
        hot_relative_pressure=0.4,
        budget_cpu_s=300.0,
    )
    cert = C.certify_filled_point(model, state, 5, cs, eos)
    assert cert.density_per_nm3 * model.probe.sigma_nm**3 > C.DENSE_FILLING
    assert cert.certified, cert.flags


@pytest.mark.parametrize(
    ("extra", "field"),
    [
        (["--lateral-box", "hexagonal", "--box", "4"], "--box"),
        (["--certify-moves", "50"], "--certify-moves"),
        (["--certify-budget", "-1"], "--certify-budget"),
    ],
)
def test_certified_path_bad_input(extra, field, capsys):
    from gcmc.cli import main

    args = ["point", "--probe", "argon", "--temperature", "87.3", "--pressure", "1e4"]
    code = main([*args, "--width", "1.0215", "--moves", "20000", "--json", *extra])
    out, err = capsys.readouterr()
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and field in lines[0], err


# --- the certified step of a quality-target build (gcmc.pipeline.escalation) ----------------

DENSE_BUILD = (
    (Path(__file__).parent / "configs" / "dense_argon.toml")
    .read_text()
    .replace("seed = 5", "seed = 3", 1)
    + """
[target]
cpu_hours = 0.01
cpu_hours_per_point = 0.0005
"""
)


def test_certified_step_writes_a_task_file_that_assembles(tmp_path, engine):
    """Argon at 87.3 K in a 3 sigma pore (as above): the build's ladder, then the point at
    p/p0 = 0.1 rerun at the certified step with a CPU budget far too small to certify it. The
    task file holds every point field, the seconds and CPU seconds, the method and the
    certificate's summary in its meta; the kernel assembled with it as an override carries
    its density, error and flags (of the one table) at that point, and the ladder's value at
    the other."""
    import numpy as np

    from gcmc.kernel.data import POINT_FIELDS
    from gcmc.pipeline.assemble import Layout, assemble_kernel, grid_layout
    from gcmc.pipeline.config import load_config
    from gcmc.pipeline.escalation import CERTIFIED, STEPS, step
    from gcmc.pipeline.refine import dense_point
    from gcmc.pipeline.tasks import Task, load_task, make_plan, run_task

    cfg_path = tmp_path / "dense.toml"
    cfg_path.write_text(DENSE_BUILD)
    plan = make_plan(load_config(cfg_path))
    (ladder,) = plan.tasks
    run_task(plan, ladder)
    first, _ = assemble_kernel(plan, 1)
    assert dense_point(first, (0, 0, 0, 1)), "the filled 3 sigma pore is dense subcritical"
    task = Task(0, 0, 0.0, point=1, step=len(STEPS) + 1, cpu_budget_s=1.0)
    assert step(task.step) is CERTIFIED
    arrays, meta = load_task(run_task(plan, task))  # run_task hands a rerun to the escalation
    assert meta["method"] == "certified tempering" and meta["effort"] == CERTIFIED.effort
    assert meta["point_method"] == "certified-tempering" and meta["cpu_budget_s"] == 1.0
    assert meta["step"] == len(STEPS) + 1 and meta["spawn_key"] == list(task.spawn_key())
    cert = meta["certificate"]
    assert not cert["certified"] and set(cert["preparations"]) == {
        *C.PREPARATIONS,
        "below, larger box",
    }
    assert all(f"point/{f}" in arrays for f in POINT_FIELDS)
    assert float(arrays["cpu_seconds"]) > 0 and float(arrays["seconds"]) > 0
    kinds = fl.kinds(meta["flags"])
    assert "budget_spent" in kinds and all(fl.lookup(k) is not None for k in kinds), kinds
    assert float(arrays["point/converged"]) == 0.0  # not certified: unconverged
    # the certified result is the preparations' mean (within their spread)
    n = float(arrays["point/density_per_nm3"])
    assert min(cert["preparations"].values()) <= n <= max(cert["preparations"].values())
    # assembled as the point's override
    grid = grid_layout(plan)
    layout = Layout(grid.widths_H_nm, grid.ladders, {(0, 0, 0, 1): task})
    data, _ = assemble_kernel(plan, 1, layout)
    pts = data.points["adsorption"]
    assert pts["density_per_nm3"][0, 0, 1] == n
    assert pts["density_per_nm3_stderr"][0, 0, 1] == float(arrays["point/density_per_nm3_stderr"])
    assert not pts["converged"][0, 0, 1]
    assert data.flags["adsorption"][0, 0, 1] == meta["flags"]
    assert pts["density_per_nm3"][0, 0, 0] == first.points["adsorption"]["density_per_nm3"][0, 0, 0]
    assert np.isfinite(data.task_seconds[0, 0])


def test_move_budget_makes_the_certificate_independent_of_the_clock(engine, monkeypatch):
    """With a budget in moves, the number of attempts (and so the point) does not depend on
    process time: the same seed gives the same point whether the clock runs normally or a
    thousand times fast (with the CPU budget alone, the fast clock stops after one attempt).
    The build's conversion of a CPU budget to moves is a function of the config alone and
    grows with the budget by whole doublings of production."""
    import time as _time

    from gcmc.pipeline.escalation import certificate_move_budget

    model, state, eos = _argon_state(87.3, 0.1)
    cs = C.CertifySettings(
        equilibration_moves=2_000,
        production_moves=4_000,
        hot_rungs=2,
        budget_cpu_s=1e6,
        max_production_moves=8_000,
    )
    normal = C.certify_filled_point(model, state, 5, cs, eos)
    real = _time.process_time
    monkeypatch.setattr(C.time, "process_time", lambda: 1000.0 * real())
    fast = C.certify_filled_point(model, state, 5, cs, eos)
    assert fast.production_moves == normal.production_moves
    assert fast.density_per_nm3 == normal.density_per_nm3
    if not normal.certified:
        assert normal.production_moves == 8_000  # both attempts ran, then the move budget
        assert fl.has_flag(normal.flags, fl.BUDGET_SPENT)
    # the same seed with the CPU budget alone (30 s): the fast clock reads 1000 x the real
    # time, so the first attempt seems to cost more than a third of the budget and it stops
    clock_only = replace(cs, max_production_moves=0, budget_cpu_s=30.0)
    stopped = C.certify_filled_point(model, state, 5, clock_only, eos)
    assert stopped.production_moves == 4_000 or stopped.certified
    monkeypatch.setattr(C.time, "process_time", real)
    base = C.CertifySettings(production_moves=100_000, hot_rungs=2)
    budgets = [certificate_move_budget(model, state, base, b) for b in (1.0, 60.0, 600.0, 6000.0)]
    assert budgets == [
        certificate_move_budget(model, state, base, b) for b in (1.0, 60.0, 600.0, 6000.0)
    ]
    assert budgets[0] == 100_000 and budgets == sorted(budgets) and budgets[-1] > budgets[0]
    ratios = [b // 100_000 for b in budgets]
    assert all(b % 100_000 == 0 and r & (r - 1) == 0 for b, r in zip(budgets, ratios, strict=True))
    print("move budgets per rung for 1, 60, 600, 6000 CPU-s:", budgets)
