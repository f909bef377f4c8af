"""The refinement planner (gcmc.pipeline.refine), the escalation steps
(gcmc.pipeline.escalation), the [target] table (gcmc.quality.target, gcmc.pipeline.config),
task keys and seeds of added widths and reruns, and checksummed task files (gcmc.pipeline.tasks).

No simulation here: the kernels are the synthetic, invented test kernels of test_check.py
(analytic two-site Langmuir isotherms whose constants vary smoothly with the width, I.
Langmuir, J. Am. Chem. Soc. 40 (1918) 1361), some with a sharp step in width added (a layering
transition's signature). The interpolation-error estimate is the check's own (the cubic through
the four nearest widths against the chord): linear interpolation errs by h^2 f''/8 in the
middle of an interval of length h (Taylor's theorem; common practice), which is what places
and counts the new widths.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from test_check import GOOD_WIDTHS, SIGMA_SS, make_kernel, two_site

from gcmc.errors import InputError
from gcmc.pipeline.assemble import Layout
from gcmc.pipeline.escalation import (
    CERTIFIED,
    STEPS,
    first_step_with_effort,
    is_dense_point,
    last_step,
    step,
    step_settings,
    steps_for,
)
from gcmc.pipeline.refine import dense_point, gap_findings, place_widths, plan_round
from gcmc.pipeline.tasks import (
    DamagedTask,
    Task,
    _atomic_savez,
    added_width_task,
    load_task,
)
from gcmc.quality.target import QualityTarget
from gcmc.sampling.point import SamplingSettings

WIDTHS = GOOD_WIDTHS[1:]  # accessible, log-spaced 0.35 - 2.7 nm (w axis)
STEP_W = float(WIDTHS[17] + 0.3 * (WIDTHS[18] - WIDTHS[17]))  # between nodes 17 and 18
STEP_SCALE = 0.004  # nm: much sharper than the grid spacing (~0.06 nm there)


def stepped(w: float) -> np.ndarray:
    """two_site with the wall layer's capacity doubled above STEP_W (a sharp sigmoid)."""
    par = two_site(w).copy()
    par[0] *= 1.0 + 1.0 / (1.0 + math.exp(-(w - STEP_W) / STEP_SCALE))
    return par


def kernel(params=two_site, widths=WIDTHS):  # noqa: ANN001, ANN201
    return make_kernel(widths, params=params, inaccessible=(), noise=False)


def layout_for(data, overrides=None) -> Layout:  # noqa: ANN001
    ladders = [[Task(0, j, 1.0) for j in range(len(data.widths_H_nm))]]
    return Layout(tuple(float(h) for h in data.widths_H_nm), ladders, overrides or {})


def costs_for(layout: Layout, seconds: float = 10.0) -> dict[str, float]:
    return {t.key: seconds for row in layout.ladders for t in row}


TARGET = QualityTarget(min_spacing_nm=0.005, cpu_hours=1.0)


# --- widths ----------------------------------------------------------------------------------


def test_smooth_kernel_needs_no_new_widths() -> None:
    data = kernel()
    assert gap_findings(data, TARGET, [0]) == []
    rp = plan_round(data, layout_for(data), TARGET, costs_for(layout_for(data)), 0.0, {})
    assert rp.widths == [] and rp.reruns == []


def test_sharp_step_gets_widths_there_and_nowhere_else() -> None:
    data = kernel(stepped)
    found = gap_findings(data, TARGET, [0])
    assert found, "the step must be seen as an interpolation error"
    new = sorted(h for _, hs, _ in found for h in hs)
    # the cubic through four neighbours spans the step from the three intervals around it only
    lo, hi = WIDTHS[16] + SIGMA_SS, WIDTHS[19] + SIGMA_SS
    assert all(lo <= h <= hi for h in new), (new, lo, hi)
    # (the interval holding the step itself is split in a later round, once its neighbours
    # are resolved: test_rounds_on_the_analytic_kernel_resolve_the_step_locally)
    # the planner's round holds these widths, and those beside the widths that are outliers
    # at several pressures (structure in width), all beside the step
    lay = layout_for(data)
    rp = plan_round(data, lay, TARGET, costs_for(lay), 0.0, {})
    planned = sorted(h for h, _ in rp.widths)
    assert set(new) <= set(planned) and all(lo <= h <= hi for h in planned), planned
    assert all(("gap" in why) or ("outlier" in why) for _, why in rp.widths)
    assert not rp.reruns, "outliers at several pressures of a width are not rerun"


def test_rounds_on_the_analytic_kernel_resolve_the_step_locally() -> None:
    """Plan, "simulate" the new widths exactly, plan again: the rounds end with every interval
    within tolerance or at the minimum spacing, and every width they added lies beside the
    step, on both sides of it. (The interval holding the step may stay unsplit: the check's
    estimate, a cubic through four neighbours, is nearly blind to a step midway between two
    widths once its neighbours are close; the planner judges by the check's own estimate.)"""
    target = dataclasses.replace(TARGET, min_spacing_nm=0.002)
    widths = list(WIDTHS)
    for _ in range(12):
        data = kernel(stepped, np.array(widths))
        lay = layout_for(data)
        rp = plan_round(data, lay, target, costs_for(lay), 0.0, {})
        if not rp.widths:  # (outliers beside the step ask for reruns: not simulated here)
            break
        widths = sorted(set(widths) | {round(h - SIGMA_SS, 10) for h, _ in rp.widths})
    else:
        raise AssertionError("rounds did not end")
    added = sorted(set(widths) - set(WIDTHS))
    assert added and all(WIDTHS[15] < w < WIDTHS[20] for w in added), added
    assert any(w < STEP_W for w in added) and any(w > STEP_W for w in added)
    assert all(f.action == "unresolvable" for f in rp.findings if f.kind == "gap")


def test_new_widths_follow_the_curvature() -> None:
    """Density ~ sqrt|P''|: for P = (w - a)^3 on [a, b] the second derivative grows linearly
    from a, so the parts shrink towards b (equal error per part, h^2 P'' = const)."""
    w = np.array([0.0, 1.0, 2.0, 3.0])
    n = w**3
    new = place_widths(w, n, 1.0, 2.0, 4, offset=0.0)
    gaps = np.diff([1.0, *new, 2.0])
    assert np.all(np.diff(gaps) < 0), gaps


def test_interval_at_min_spacing_is_unresolvable() -> None:
    data = kernel(stepped)
    coarse = dataclasses.replace(TARGET, min_spacing_nm=1.0)
    found = gap_findings(data, coarse, [0])
    assert found and all(f.action == "unresolvable" and not hs for f, hs, _ in found)
    lay = layout_for(data)
    rp = plan_round(data, lay, coarse, costs_for(lay), 0.0, {})
    assert not rp.widths and any("minimum" in f.detail for f in rp.open_findings)


# --- points ----------------------------------------------------------------------------------


def unconverged(data, j: int, k: int):  # noqa: ANN001, ANN201
    pts = {b: {f: a.copy() for f, a in d.items()} for b, d in data.points.items()}
    pts["adsorption"]["converged"][0, j, k] = False
    flags = {b: a.copy() for b, a in data.flags.items()}
    flags["adsorption"][0, j, k] = "drift[0]: first vs second half z = 5.0"
    return dataclasses.replace(data, points=pts, flags=flags)


def test_unconverged_point_escalates_step_by_step() -> None:
    data = unconverged(kernel(), 10, 5)
    lay = layout_for(data)
    rp = plan_round(data, lay, TARGET, costs_for(lay), 0.0, {})
    assert [(t.point, t.step) for t, _, _ in rp.reruns] == [(5, 1)]
    task, key, _ = rp.reruns[0]
    assert key == (0, 10, 0, 5) and task.key == "t000_w010_b0p005s1"
    # after step 1 the same failure asks for step 2
    lay2 = dataclasses.replace(lay, overrides={key: task})
    rp2 = plan_round(data, lay2, TARGET, costs_for(lay), 0.0, {})
    assert [t.step for t, _, _ in rp2.reruns] == [2]


def test_point_that_cannot_converge_is_reported_not_rerun() -> None:
    data = unconverged(kernel(), 10, 5)
    last = Task(0, 10, 1.0, point=5, step=len(STEPS))
    lay = layout_for(data, {(0, 10, 0, 5): last})
    rp = plan_round(data, lay, TARGET, costs_for(lay), 0.0, {})
    assert rp.reruns == []
    (f,) = [f for f in rp.findings if f.kind == "unconverged"]
    assert f.action == "given_up" and "last escalation step" in f.detail


def test_per_point_budget_stops_escalation() -> None:
    data = unconverged(kernel(), 10, 5)
    lay = layout_for(data)
    tight = dataclasses.replace(TARGET, cpu_hours_per_point=1e-6)
    rp = plan_round(data, lay, tight, costs_for(lay, 100.0), 0.0, {})
    assert rp.reruns == []
    assert any(f.action == "given_up" and "per-point budget" in f.detail for f in rp.findings)


def test_budget_cuts_the_round() -> None:
    data = unconverged(kernel(stepped), 10, 5)
    lay = layout_for(data)
    spent = TARGET.cpu_seconds - 1.0  # one CPU second left: nothing fits
    rp = plan_round(data, lay, TARGET, costs_for(lay), spent, {})
    assert rp.empty and rp.cut_by_budget
    assert any(f.action == "budget" for f in rp.findings)


def test_error_target_asks_for_enough_effort() -> None:
    """A relative error r above the target e needs (r/e)^2 times the moves (error ~ 1/sqrt
    of the samples: common practice); the planner picks the first step with that effort."""
    data = kernel()
    pts = {b: {f: a.copy() for f, a in d.items()} for b, d in data.points.items()}
    n = pts["adsorption"]["density_per_nm3"][0, 12, 8]
    pts["adsorption"]["density_per_nm3_stderr"][0, 12, 8] = 0.03 * n  # 1.5 x the 0.02 target
    data = dataclasses.replace(data, points=pts)
    lay = layout_for(data)
    rp = plan_round(data, lay, TARGET, costs_for(lay), 0.0, {})
    (task,) = [t for t, _, _ in rp.reruns]
    assert step(task.step).effort >= 1.5**2
    assert first_step_with_effort(0, 2.9) == 3 - 1  # 4x is step 2


def test_step_settings_escalate_moves_then_method() -> None:
    base = SamplingSettings(equilibration_moves=1000, production_moves=10000, sample_every=10)
    efforts = [step(i).effort for i in range(1, len(STEPS) + 1)]
    assert efforts == sorted(efforts)
    s1 = step_settings(base, 1)
    assert s1.production_moves == 2 * base.production_moves and s1.insertion_trials == 0
    s3 = step_settings(base, 3)
    assert s3.insertion_trials == base.biased_trials
    assert step_settings(base, len(STEPS)).replicas == 3


# --- the certified step: dense subcritical points only -----------------------------------------

#: the test kernel's temperature (298.15 K) is below this invented critical temperature (its
#: probe "testgas" is invented too): its filled points are dense subcritical
TC_SUB, TC_SUPER = 400.0, 190.0
DENSE = (10, 15)  # rho sigma^3 = 10.6 x 0.37^3 = 0.54 > DENSE_FILLING (0.5)
DILUTE = (10, 5)  # rho sigma^3 = 0.25 x 0.37^3 ~ 0.01


def with_tc(data, tc: float):  # noqa: ANN001, ANN201
    return dataclasses.replace(data, probe={**data.probe, "critical_temperature_K": tc})


def unconverged_at(data, jk: tuple[int, int], tc: float):  # noqa: ANN001, ANN201
    return with_tc(unconverged(data, *jk), tc)


def rerun_at(j: int, k: int, s: int) -> dict:
    return {(0, j, 0, k): Task(0, j, 1.0, point=k, step=s)}


def test_step_choice_is_a_function_of_density_and_temperature() -> None:
    """Dense subcritical (the certificate's predicate: slit, T < T_c, rho sigma^3 > 0.5): the
    certified step after all of STEPS; anything else: STEPS only."""
    assert steps_for(False) == STEPS and last_step(False) == len(STEPS)
    assert steps_for(True) == (*STEPS, CERTIFIED) and last_step(True) == len(STEPS) + 1
    assert step(len(STEPS) + 1) is CERTIFIED and CERTIFIED.point_method == "certified-tempering"
    assert all(not s.point_method for s in STEPS)
    probe = {"sigma_nm": 0.3405, "critical_temperature_K": 150.7}  # an argon-like LJ site
    dense = 0.8 / 0.3405**3  # rho sigma^3 = 0.8: a liquid-like filling
    assert is_dense_point(87.3, probe, dense)
    assert not is_dense_point(160.0, probe, dense)  # above T_c: supercritical
    assert not is_dense_point(150.7, probe, dense)  # at T_c: not below it
    assert not is_dense_point(87.3, probe, 0.2 / 0.3405**3)  # a gas-like filling
    assert not is_dense_point(87.3, probe, float("nan"))
    assert not is_dense_point(87.3, {"sigma_nm": 0.3405}, dense)  # no T_c known
    assert not is_dense_point(87.3, probe, dense, geometry="bulk")
    # from a kernel: the point's current density, the kernel's temperature and probe
    data = kernel()
    assert dense_point(with_tc(data, TC_SUB), (0, *DENSE[:1], 0, DENSE[1]))
    assert not dense_point(with_tc(data, TC_SUB), (0, DILUTE[0], 0, DILUTE[1]))
    assert not dense_point(with_tc(data, TC_SUPER), (0, DENSE[0], 0, DENSE[1]))
    assert not dense_point(data, (0, DENSE[0], 0, DENSE[1]))  # the test probe has no T_c


def escalate(data, jk: tuple[int, int], target: QualityTarget = TARGET, spent: float = 0.0):  # noqa: ANN001, ANN201
    """Escalate one failing point round by round (each rerun "still failing"); the steps it
    was given, and the finding that ended it."""
    j, k = jk
    lay = layout_for(data)
    steps, budgets = [], []
    for _ in range(len(STEPS) + 3):
        rp = plan_round(data, lay, target, costs_for(lay), 0.0, {(0, j, 0, k): spent})
        mine = [(t, why) for t, key, why in rp.reruns if key == (0, j, 0, k)]
        if not mine:
            (f,) = [f for f in rp.findings if f.where.endswith(f"{data.pressures_Pa[0, k]:.4g} Pa")]
            return steps, budgets, f
        task = mine[0][0]
        steps.append(task.step)
        budgets.append(task.cpu_budget_s)
        lay = dataclasses.replace(lay, overrides={(0, j, 0, k): task})
    raise AssertionError("escalation did not end")


def test_dense_subcritical_point_escalates_to_the_certified_step_after_the_others() -> None:
    data = unconverged_at(kernel(), DENSE, TC_SUB)
    steps, budgets, f = escalate(data, DENSE)
    assert steps == [1, 2, 3, 4, len(STEPS) + 1]
    assert budgets == [0.0] * 4 + [TARGET.cpu_seconds_per_point]  # nothing spent before
    assert f.action == "given_up" and "certified tempering" in f.detail
    # what the earlier reruns spent is not the certificate's any more
    _, budgets, _ = escalate(data, DENSE, spent=100.0)
    assert budgets[-1] == TARGET.cpu_seconds_per_point - 100.0


def test_supercritical_or_dilute_point_never_reaches_the_certified_step() -> None:
    for data, jk in (
        (unconverged_at(kernel(), DENSE, TC_SUPER), DENSE),  # filled, but above T_c
        (unconverged_at(kernel(), DILUTE, TC_SUB), DILUTE),  # below T_c, but a gas
        (unconverged(kernel(), *DENSE), DENSE),  # no T_c known
    ):
        steps, budgets, f = escalate(data, jk)
        assert steps == [1, 2, 3, 4] and budgets == [0.0] * 4
        assert f.action == "given_up" and "last escalation step" in f.detail
        assert step(len(STEPS)).describe() in f.detail


def test_supercritical_rounds_are_those_without_the_certified_step() -> None:
    """The plan of a supercritical kernel is the same whatever its probe's T_c says as long
    as T > T_c, and the same as with no T_c at all: the certified step changes nothing
    there."""
    base = unconverged(kernel(stepped), 10, 5)
    pts = {b: {f: a.copy() for f, a in d.items()} for b, d in base.points.items()}
    pts["adsorption"]["density_per_nm3_stderr"][0, 12, 15] *= 3.0  # above the error target
    base = dataclasses.replace(base, points=pts)
    lay = layout_for(base, rerun_at(12, 15, len(STEPS)))
    plans = []
    for data in (base, with_tc(base, TC_SUPER)):
        rp = plan_round(data, lay, TARGET, costs_for(lay), 0.0, {})
        plans.append(
            ([(t, key) for t, key, _ in rp.reruns], rp.widths, [f.line() for f in rp.findings])
        )
    assert plans[0] == plans[1]
    assert all(t.step <= len(STEPS) and t.cpu_budget_s == 0.0 for t, _ in plans[0][0])


def test_error_target_reaches_the_certified_step_only_from_the_last_of_steps() -> None:
    data = with_tc(kernel(), TC_SUB)
    pts = {b: {f: a.copy() for f, a in d.items()} for b, d in data.points.items()}
    j, k = DENSE
    pts["adsorption"]["density_per_nm3_stderr"][0, j, k] = (
        0.2 * pts["adsorption"]["density_per_nm3"][0, j, k]
    )  # 10 x the 0.02 target: more effort than any step has
    data = dataclasses.replace(data, points=pts)
    assert first_step_with_effort(0, 1e3) == len(STEPS)  # the last of STEPS, not the certificate
    assert first_step_with_effort(len(STEPS), 1e3) == len(STEPS) + 1
    steps, _, f = escalate(data, DENSE)
    assert steps == [len(STEPS), len(STEPS) + 1] and f.action == "given_up"


def test_certified_step_is_given_up_when_its_first_attempt_does_not_fit() -> None:
    """The planner's estimate of the certificate's first attempt (its chains' rungs, in
    ladder points: CERTIFIED.cost_factor) against what is left of the per-point budget."""
    data = unconverged_at(kernel(), DENSE, TC_SUB)
    j, k = DENSE
    lay = layout_for(data, rerun_at(j, k, len(STEPS)))
    # the point's own seconds per unit of effort: 10 s; the first attempt ~ 10 x cost_factor
    pts = {b: {f: a.copy() for f, a in d.items()} for b, d in data.points.items()}
    pts["adsorption"]["seconds"][0, j, k] = 10.0 * step(len(STEPS)).cost_factor
    data = dataclasses.replace(data, points=pts)
    first = 10.0 * CERTIFIED.cost_factor
    assert CERTIFIED.cost_factor > step(len(STEPS)).cost_factor
    for left, runs in ((first * 0.9, False), (first * 1.1, True)):
        spent = TARGET.cpu_seconds_per_point - left
        rp = plan_round(data, lay, TARGET, costs_for(lay), 0.0, {(0, j, 0, k): spent})
        mine = [t for t, key, _ in rp.reruns if key == (0, j, 0, k)]
        if runs:
            assert [t.step for t in mine] == [len(STEPS) + 1]
            assert mine[0].cpu_budget_s == pytest.approx(left)
            assert mine[0].estimated_cost == pytest.approx(left)  # what it may spend
        else:
            assert not mine
            assert any(
                f.action == "given_up" and "what is left of the per-point budget" in f.detail
                for f in rp.findings
            )


def test_show_names_the_method_that_produced_each_rerun_point() -> None:
    """`gcmc show`'s refinement lines from a kernel's provenance (the build's points_rerun
    record, one entry per replaced point with its step's method)."""
    from gcmc.cli.kernel import refinement_lines

    rerun = {
        "t000_w010 adsorption p15": {"step": 5, "method": CERTIFIED.method, "effort": 1.0},
        "t000_w011 adsorption p3": {"step": 1, "method": STEPS[0].method, "effort": 2.0},
        "t000_w012 adsorption p3": {"step": 1, "method": STEPS[0].method, "effort": 2.0},
    }
    lines = refinement_lines({"rounds": [], "points_rerun": rerun, "stop": "target met"})
    (line,) = [x for x in lines if x.startswith("points rerun, by the method")]
    assert "auto insertion 2x x2" in line and "certified tempering 1x x1" in line
    assert not any("by the method" in x for x in refinement_lines({"rounds": []}))


# --- tasks -----------------------------------------------------------------------------------


def test_added_width_and_rerun_tasks_have_their_own_keys_and_streams() -> None:
    a = added_width_task(0, 0.7625)
    assert a.key == "t000_h0076250" and a.w_index == -1
    grid = Task(0, 3, 1.0)
    rerun = Task(0, 3, 1.0, point=2, step=1)
    keys = {t.spawn_key() for t in (a, grid, rerun, Task(0, 3, 1.0, point=2, step=2))}
    assert len(keys) == 4
    assert grid.spawn_key() == (0, 3)  # the config's grid keeps its seeds
    assert rerun.ladder() == Task(0, 3, 0.0)


def test_damaged_task_file_is_detected(tmp_path: Path) -> None:
    p = tmp_path / "t000_w000.npz"
    arrays = {"x": np.arange(5.0), "meta_json": np.frombuffer(b"{}", dtype=np.uint8)}
    _atomic_savez(p, arrays)
    got, meta = load_task(p)
    assert np.array_equal(got["x"], arrays["x"]) and meta == {}
    raw = bytearray(p.read_bytes())
    raw[len(raw) // 2] ^= 0xFF
    p.write_bytes(bytes(raw))
    with pytest.raises(DamagedTask):
        load_task(p)


# --- the [target] table ------------------------------------------------------------------------

BASE_CONFIG = """
seed = 1
[kernel]
name = "t"
[probe]
library_name = "methane"
[widths]
H_nm = [0.8, 1.0]
[temperatures]
K = [298.15]
[pressures]
Pa = [1e4, 1e5]
"""


def load(text: str, tmp_path: Path):  # noqa: ANN201
    from gcmc.pipeline.config import load_config

    p = tmp_path / "c.toml"
    p.write_text(BASE_CONFIG + text)
    return load_config(p)


def test_target_table_parses_and_travels(tmp_path: Path) -> None:
    cfg = load(
        "[target]\nnoise_rel = 0.02\np_range_Pa = [1e3, 1e6]\np_points = 5\ncpu_hours = 0.5\n",
        tmp_path,
    )
    t = cfg.target
    assert t is not None and t.noise_rel == 0.02 and len(t.pressures_Pa) == 5
    assert t.cpu_hours_per_point == pytest.approx(0.5 / 20)
    assert QualityTarget.from_dict(t.to_dict()) == t
    assert cfg.refining
    plain = load("", tmp_path)
    assert plain.target is None and not plain.refining
    # the target changes the kernel's hash, not the tasks' (their results do not depend on it)
    assert cfg.config_hash != plain.config_hash and cfg.task_hash == plain.task_hash
    off = load("[target]\nrefine = false\n", tmp_path)
    assert not off.refining and off.target is not None


@pytest.mark.parametrize(
    "text, field",
    [
        ("noise_rel = -1", "target.noise_rel"),
        ("width_tolerance = 2.0", "target.width_tolerance"),
        ("cpu_hours = 0", "target.cpu_hours"),
        ("cpu_hours = 1\ncpu_hours_per_point = 2", "target.cpu_hours_per_point"),
        ("max_rounds = -1", "target.max_rounds"),
        ("min_spacing_nm = 'x'", "target.min_spacing_nm"),
        ("pressures_Pa = [1e5, 1e4]", "target.pressures_Pa"),
        ("p_points = 4", "target.p_points"),
        ("bogus = 1", "target.bogus"),
        ("refine = 1", "target.refine"),
    ],
)
def test_bad_target_field_is_one_line_naming_it(tmp_path: Path, text: str, field: str) -> None:
    with pytest.raises(InputError) as exc:
        load(f"[target]\n{text}\n", tmp_path)
    msg = str(exc.value)
    assert field in msg and "\n" not in msg, msg
