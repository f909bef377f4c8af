"""The a-priori task cost model (gcmc.pipeline.cost) that orders a first build's tasks.

Only the order of work depends on it, never a result, so these tests check its exact limits
and the qualitative behaviour it exists for; how well it orders real builds is measured in
benchmarks/schedule_replay.py (benchmarks/README.md, "Scheduling efficiency").
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest

from gcmc.physics.eos import make_eos
from gcmc.physics.henry import pore_limit
from gcmc.physics.model import SLIT, PoreModel, default_solid, get_probe
from gcmc.pipeline.config import RunConfig, parse_config
from gcmc.pipeline.cost import CAPACITY_RHO_SIGMA3, estimate_task_cost, estimated_loading_per_nm3
from gcmc.pipeline.tasks import make_plan


def _methane_config(widths: list[float], sampling: bool = False) -> RunConfig:
    """A methane run config at 298.15 K, 1 kPa - 3.5 MPa (6 pressures), over these widths."""
    text = f"""
seed = 1
[kernel]
name = "order"
output = "out"
[probe]
library_name = "methane"
[widths]
H_nm = {widths!r}
[temperatures]
K = [298.15]
[pressures]
from_Pa = 1.0e3
to_Pa = 3.5e6
count = 6
"""
    if sampling:
        text += (
            "[sampling]\nequilibration_moves = 1000\nproduction_moves = 4000\nsample_every = 20\n"
        )
    return parse_config(tomllib.loads(text), text, Path("order.toml"))


def _model(h: float, probe: str = "methane") -> PoreModel:
    p = get_probe(probe)
    return PoreModel(
        probe=p,
        solid=default_solid(),
        geometry=SLIT,
        cutoff_nm=3 * p.sigma_nm,
        box_nm=10 * p.sigma_nm,
        width_nm=h,
    )


def test_loading_estimate_has_the_exact_henry_slope_and_the_capacity() -> None:
    """Exact limits of the Langmuir estimate: slope K_H (the exact Henry constant) at zero
    fugacity, the stated capacity at infinite fugacity."""
    sig = 0.373
    kh = 3.0e-5  # nm^-3 Pa^-1
    low = estimated_loading_per_nm3(kh, np.array([1e-6]), sig)[0]
    assert low / (kh * 1e-6) == pytest.approx(1.0, rel=1e-9)
    high = estimated_loading_per_nm3(kh, np.array([1e20]), sig)[0]
    assert high * sig**3 == pytest.approx(CAPACITY_RHO_SIGMA3, rel=1e-9)


def test_narrow_filling_pores_cost_more_than_wide_ones_at_room_temperature() -> None:
    """Measured behaviour the model exists for (benchmarks/README.md, methane at 298 K): the
    narrow pores fill and switch to biased insertion, and cost several times more than the
    wide ones, which stay gas-like."""
    eos = make_eos("reference", get_probe("methane"))
    f = np.array([eos.state(298.15, p).fugacity_Pa for p in np.geomspace(1e3, 3.5e6, 8)])

    def cost(h: float) -> float:
        return estimate_task_cost(_model(h), 298.15, f, 1e5, 0, 64, 0.5)

    assert cost(0.7) > 2.0 * cost(2.0)
    # the same grid with biased insertion everywhere: then the neighbours decide, and the
    # wider (more populated) pore costs more
    fixed = [estimate_task_cost(_model(h), 298.15, f, 1e5, 64, 64, 0.5) for h in (0.7, 2.0)]
    assert fixed[1] > fixed[0]


def test_blocked_pore_costs_nothing_and_cost_scales_with_work() -> None:
    h_blocked = 0.45  # methane cannot enter (tests/test_engine_physics.py)
    assert pore_limit(_model(h_blocked), 298.15).blocked
    assert estimate_task_cost(_model(h_blocked), 298.15, np.array([1e6]), 1e5, 0, 64, 0.5) == 0
    base = estimate_task_cost(_model(1.0), 298.15, np.array([1e5, 1e6]), 1e5, 0, 64, 0.5)
    both = estimate_task_cost(
        _model(1.0), 298.15, np.array([1e5, 1e6]), 1e5, 0, 64, 0.5, branches=2, replicas=2
    )
    assert both == pytest.approx(4 * base, rel=1e-12)


def test_plan_orders_tasks_by_the_estimate() -> None:
    cfg = _methane_config([0.7, 1.0, 1.5, 2.0], sampling=True)
    plan = make_plan(cfg)
    costs = [t.estimated_cost for t in plan.tasks]
    assert costs == sorted(costs, reverse=True)
    assert plan.tasks[0].w_index == 0  # the narrowest pore first (it fills: biased insertion)


def test_resumed_build_rescales_the_estimate_by_measured_neighbours(tmp_path, monkeypatch) -> None:
    """learned_order: the estimate of a pending task is rescaled by what its finished
    neighbours cost against their estimates (the median of those ratios). Pending w0 (finished
    neighbour w1 took its estimate) and w2 (finished neighbours w1, and w3 at m times its
    estimate, so a factor (1 + m)/2): w2 goes first exactly when (1 + m)/2 est(w2) > est(w0),
    i.e. m > 2 est(w0)/est(w2) - 1."""
    import gcmc.pipeline.tasks as B

    cfg = _methane_config([0.7, 0.8, 1.6, 1.8])
    plan = make_plan(cfg)
    est = {t.w_index: t.estimated_cost for t in plan.tasks}
    ratio = est[0] / est[2]
    assert ratio > 1.2  # the narrow pore is estimated dearer than the wide one (see above)
    measured = {1: 1.0 * est[1], 3: 0.0}
    files = {w: tmp_path / f"w{w}.npz" for w in measured}
    for f in files.values():
        f.write_bytes(b"")
    monkeypatch.setattr(B, "task_path", lambda _plan, t: files.get(t.w_index, tmp_path / "x"))
    monkeypatch.setattr(
        B,
        "load_task",
        lambda p: ({"seconds": next(measured[w] for w, f in files.items() if f == p)}, {}),
    )
    pending = [t for t in plan.tasks if t.w_index in (0, 2)]
    m_even = 2.0 * ratio - 1.0
    measured[3] = 0.8 * m_even * est[3]  # rescaled, w2 stays below w0
    assert [t.w_index for t in B.learned_order(plan, pending)] == [0, 2]
    measured[3] = 1.25 * m_even * est[3]  # rescaled, w2 overtakes w0
    assert [t.w_index for t in B.learned_order(plan, pending)] == [2, 0]
