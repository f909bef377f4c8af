"""Builds with an ``[equilibrium]`` table: the planner, the anchor-path tasks, the stored
equilibrium branch (gcmc.pipeline.anchor, gcmc.kernel.eqbranch).

Fast tests run on synthetic task results: the mean-field lattice gas of
tests/test_equilibrium.py (c = eps/T; its grand potential, energy and coexistence are exact in
the model: beta Omega/V = n_m[ln(1 - theta) + c theta^2/2], u = -(eps/2) n_m theta^2,
coexistence at ln(b f) = -c/2 by particle-hole symmetry) stands in for the points and for the
anchor path's states, written as task files the way a build writes them.

The end-to-end test builds a real kernel (tests/configs/equilibrium.toml: argon at 100 K in a
3 nm graphite slit, whose branches show a capillary-condensation loop, and a blocked 0.45 nm
slit), about 30 s of simulation per build; it interrupts a build at its anchor task (the fault
seam gcmc.pipeline.faults) and checks that the resumed build gives the uninterrupted kernel,
bit for bit (tests/test_build_resume.assert_same_kernel).

Exact property checked on the real kernel: the equilibrium transition lies between the
desorption branch's drop and the adsorption branch's jump (Peterson & Gubbins, Mol. Phys. 62
(1987) 215), i.e. inside the grid interval that brackets the loop; equivalently the liquid
anchor lies between the grand potentials obtained by integrating either branch through its
irreversible step (gcmc.kernel.equilibrium, module docstring), which the test also checks.
"""

from __future__ import annotations

import dataclasses
import math
import shutil
import tomllib
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from set_kernels import small
from test_build_resume import (
    assert_same_kernel,
    check_ok,
    copy_config,
    output_dir,
    run_build,
)
from test_equilibrium import (
    EPS_K,
    F_DN,
    F_EQ,
    F_UP,
    N_M,
    T_K,
    B,
    S,
    _theta_at,
    beta_omega,
    branches,
)

from gcmc.cli.kernel import summary
from gcmc.errors import InputError
from gcmc.kernel import equilibrium as eq
from gcmc.kernel.eqbranch import DATASETS, EquilibriumBranch
from gcmc.kernel.reader import open_kernel
from gcmc.kernel.writer import write_kernel
from gcmc.physics.units import activity_per_nm3
from gcmc.pipeline import anchor as an
from gcmc.pipeline.assemble import Layout
from gcmc.pipeline.config import load_config, parse_config
from gcmc.pipeline.tasks import Task, finish_task, make_plan

CONFIG = Path(__file__).resolve().parent / "configs" / "equilibrium.toml"
NAME = "eq-argon"


def config_text(**equilibrium: object) -> str:
    """The test config's text with its [equilibrium] table replaced (None: removed)."""
    text = CONFIG.read_text().split("[equilibrium]")[0]
    if equilibrium.get("_drop"):
        return text
    rows = "\n".join(f"{k} = {v!r}".replace("'", '"') for k, v in equilibrium.items())
    return text + "[equilibrium]\n" + rows + "\n"


def parse(text: str, name: str = "equilibrium.toml"):
    return parse_config(tomllib.loads(text), text, CONFIG.parent / name)


# --- config ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("rows", "match"),
    [
        ({"hot_temperature_K": 120.0}, r"equilibrium\.hot_temperature_K: must be above"),
        ({"hot_temperature_factor": 0.9}, r"equilibrium\.hot_temperature_factor: must be > 1"),
        ({"isotherm_states": 2}, r"equilibrium\.isotherm_states: must be >= 3"),
        ({"cooling_steps": 4}, r"equilibrium\.cooling_steps: unknown field"),
        ({"dilute_density_sigma3": 0.5}, r"equilibrium\.dilute_density_sigma3: must be < 0\.1"),
        (
            {"hot_temperature_K": 200.0, "hot_temperature_factor": 1.2},
            r"equilibrium: give at most one",
        ),
    ],
)
def test_a_bad_table_is_a_one_line_input_error(rows, match):
    with pytest.raises(InputError, match=match) as exc:
        parse(config_text(**rows))
    assert "\n" not in str(exc.value) and str(exc.value).startswith("equilibrium.toml:")


def test_the_table_needs_the_desorption_branch():
    text = config_text(isotherm_states=8).replace("descending = true", "descending = false")
    with pytest.raises(InputError, match=r"equilibrium: needs pressures\.descending = true"):
        parse(text)


def test_configs_without_the_table_keep_their_hash():
    # the shipped kernels were built before the table existed: their configs must still hash
    # to the value stored in the files (else a rebuild would not see them as up to date)
    repo = CONFIG.parents[2]
    for name in ("methane-298K", "tetrafluoromethane-298K", "carbon-dioxide-273K"):
        cfg = load_config(repo / "configs" / f"{name}.toml")
        assert cfg.equilibrium is None
        assert (
            cfg.config_hash == open_kernel(repo / "kernels" / f"{name}.v2.h5").info["config_hash"]
        )
    # the table changes the kernel's identity but not the ladders' task files
    with_eq, without = parse(config_text(isotherm_states=8)), parse(config_text(_drop=True))
    assert with_eq.config_hash != without.config_hash
    assert with_eq.task_hash == without.task_hash
    other = parse(config_text(isotherm_states=9))
    assert other.equilibrium_tag != with_eq.equilibrium_tag  # anchor files are not reused


# --- the path ----------------------------------------------------------------------------


def test_the_path_legs():
    cfg = load_config(CONFIG)
    plan = make_plan(cfg)
    tp = plan.temperatures[0]
    model = an.pore_model(cfg, 1)
    path = an.anchor_path(cfg, tp, model)
    e = cfg.equilibrium
    assert len(path) == an.max_path_states(cfg) == 8 + 4 + 2
    t, lnz, leg = path.temperature_K, path.ln_z, path.leg
    # the hot isotherm is above the bulk critical temperature (the LJ model fluid's is the
    # larger for argon: 1.312 x 119.8 K > 150.7 K, Potoff & Panagiotopoulos 1998, from memory)
    t_hot = 1.1 * 1.3120 * 119.8
    assert cfg.hot_temperature_K == pytest.approx(t_hot)
    assert np.all(t[leg == 0] == cfg.hot_temperature_K) and np.all(np.diff(lnz[leg == 0]) > 0)
    # cooling at fixed ln z, evenly in beta, down to exactly the kernel's temperature
    cool = np.r_[np.flatnonzero(leg == 0)[-1], np.flatnonzero(leg == 1)]
    assert np.all(lnz[cool] == lnz[cool[0]])
    assert np.allclose(np.diff(1 / t[cool]), (1 / 100.0 - 1 / t_hot) / 4)
    assert t[cool[-1]] == 100.0
    # ln z_fix is at or above p_c/(k T_c) (an upper bound of the bulk critical activity)
    assert lnz[cool[0]] >= math.log(an.critical_activity_per_nm3(cfg)) - 1e-12
    # the last state is the kernel's top grid point (the desorption branch's first)
    assert lnz[-1] == math.log(activity_per_nm3(tp.fugacities_Pa[-1], 100.0))
    assert np.all(t[leg == 2] == 100.0) and np.all(np.diff(lnz[leg == 2]) < 0)
    # a dilute start: the Henry-law density there is the configured one
    assert path.henry_density0_per_nm3 == pytest.approx(
        e.dilute_density_sigma3 / cfg.probe.sigma_nm**3, rel=1e-9
    )


# --- synthetic kernel and task files (the lattice gas) ------------------------------------


def lattice_kernel():
    """small() with the lattice gas's loop in its widest pore, the others without a loop."""
    d = small()
    p = np.asarray(d.pressures_Pa[0])
    j = d.widths_w_nm.size - 1
    ads = {k: np.array(v, copy=True) for k, v in d.points["adsorption"].items()}
    des = {k: np.array(v, copy=True) for k, v in ads.items()}
    na, nd = branches(p)  # this kernel's bulk is ideal: f = p
    ads["density_per_nm3"][0, j] = na
    des["density_per_nm3"][0, j] = nd
    for b in (ads, des):
        b["density_per_nm3_stderr"][0, j] = S
    henry = np.array(d.henry_per_nm3_per_pa, copy=True)
    henry[0, j] = N_M * B
    d = dataclasses.replace(
        d,
        points={"adsorption": ads, "desorption": des},
        flags={"adsorption": d.flags["adsorption"], "desorption": d.flags["adsorption"].copy()},
        henry_per_nm3_per_pa=henry,
    )
    return d, j, na, nd


def fake_plan(tmp_path: Path, **rows):
    # the synthetic kernel's temperature must lie below the path's hot temperature (the
    # planner plans no path at or above it)
    cfg = parse(config_text(hot_temperature_K=2000.0, **rows))
    assert small().temperatures_K[0] < cfg.hot_temperature_K
    return SimpleNamespace(config=cfg, task_dir=tmp_path / "tasks")


def grid_of(d) -> Layout:
    n_w = d.widths_H_nm.size
    return Layout(tuple(d.widths_H_nm), [[Task(0, j, 0.0) for j in range(n_w)]], {})


def write_lattice_path(plan, task: Task, f_top: float) -> None:
    """An anchor task file whose states are the lattice gas's exact n and u along the path
    the test of gcmc.kernel.equilibrium uses (ln lambda = ln(b z), any fixed normalisation:
    only differences of ln z enter)."""
    ln_top = float(np.log(B * f_top))
    b_hi, b_lo = 1 / (2 * T_K), 1 / T_K
    leg1 = np.linspace(np.log(1e-3), 0.0, 24)
    leg2 = np.linspace(b_hi, b_lo, 8)[1:]
    leg3 = np.linspace(0.0, ln_top, 5)[1:]
    beta = np.concatenate([np.full(leg1.size, b_hi), leg2, np.full(leg3.size, b_lo)])
    ln_lam = np.concatenate([leg1, np.zeros(leg2.size), leg3])
    theta = _theta_at(beta, ln_lam)
    n = N_M * theta
    u = -(EPS_K / 2) * N_M * theta**2
    m = beta.size
    arrays = {
        "path/temperature_K": 1 / beta,
        "path/ln_z": ln_lam,
        "path/leg": np.r_[np.zeros(24), np.ones(7), np.full(4, 2.0)],
        "path/density_per_nm3": n,
        "path/density_per_nm3_stderr": np.full(m, S),
        "path/energy_K_per_nm3": u,
        "path/energy_K_per_nm3_stderr": np.zeros(m),
        "path/converged": np.ones(m),
        "henry_density0_per_nm3": np.array(N_M * np.exp(ln_lam[0])),
        "seconds": np.array(0.0),
        "cpu_seconds": np.array(0.0),
        "meta_json": np.frombuffer(b'{"flags": []}', dtype=np.uint8),
    }
    finish_task(plan, task, arrays)


def test_the_planner_plans_anchors_only_for_pores_with_a_loop(tmp_path):
    d, j, _, _ = lattice_kernel()
    plan = fake_plan(tmp_path, isotherm_states=24, cooling_states=8, liquid_states=5)
    tasks = an.plan_anchor_tasks(plan, d, grid_of(d))
    tag = plan.config.equilibrium_tag
    assert [t.key for t in tasks] == [f"t000_w{j:03d}_eq{tag}"]
    assert tasks[0].spawn_key() == (0, j, 2_000_000)  # its own random stream
    # at or above the path's hot temperature no path is planned (298.15 K > 1.1 T_c here)
    hot = SimpleNamespace(config=parse(config_text(isotherm_states=24)), task_dir=tmp_path)
    assert hot.config.hot_temperature_K < d.temperatures_K[0]
    assert an.plan_anchor_tasks(hot, d, grid_of(d)) == []
    # no desorption branch (or no loop anywhere): nothing to anchor
    assert an.plan_anchor_tasks(plan, small(), grid_of(d)) == []
    flat = dataclasses.replace(
        d, points={"adsorption": d.points["adsorption"], "desorption": d.points["adsorption"]}
    )
    assert an.plan_anchor_tasks(plan, flat, grid_of(d)) == []


def test_the_stored_branch_from_synthetic_task_files(tmp_path):
    d, j, na, nd = lattice_kernel()
    plan = fake_plan(tmp_path, isotherm_states=24, cooling_states=8, liquid_states=5)
    layout = grid_of(d)
    tasks = an.plan_anchor_tasks(plan, d, layout)
    write_lattice_path(plan, tasks[0], float(np.asarray(d.fugacities_Pa)[0, -1]))
    e = an.equilibrium_branch(plan, d, layout, tasks)
    # only the pore with the loop has one, and a transition
    assert e.has_loop.tolist() == [[k == j for k in range(d.widths_H_nm.size)]]
    assert e.has_transition[0, j] and e.reason[0, j] == ""
    # the anchor is the exact beta Omega/V of the top point, within its stated error
    exact = float(beta_omega(nd[-1] / N_M))
    err = e.anchor_integration_error[0, j] + 4 * e.anchor_stderr[0, j]
    assert abs(e.anchor_beta_omega_per_nm3[0, j] - exact) <= err
    # the transition: the exact coexistence (particle-hole symmetry), between the exact
    # spinodals (the jumps; Peterson & Gubbins 1987)
    f_eq = e.fugacity_Pa[0, j]
    assert abs(np.log(f_eq / F_EQ)) <= e.ln_f_integration_error[0, j] + 4 * e.ln_f_stderr[0, j]
    assert F_DN < f_eq < F_UP
    # the branch: adsorption below f_eq, desorption above; other pores: adsorption, no loop
    p = np.asarray(d.pressures_Pa[0])
    np.testing.assert_array_equal(e.density_per_nm3[0, j], np.where(p < f_eq, na, nd))
    for k in range(d.widths_H_nm.size - 1):
        assert e.reason[0, k] == eq.NO_LOOP
        np.testing.assert_array_equal(
            e.density_per_nm3[0, k], d.points["adsorption"]["density_per_nm3"][0, k]
        )
    # the path is stored with the anchor (35 states, the config's maximum)
    assert e.path_ln_z.shape == (1, d.widths_H_nm.size, 35)
    assert np.all(np.isfinite(e.path_ln_z[0, j])) and np.all(np.isnan(e.path_ln_z[0, 0]))

    # round trip through the kernel file: every array back as stored; schema 1.1
    d.equilibrium = e
    k = open_kernel(write_kernel(d, tmp_path / "kernels"))
    assert k.info["schema_version"] == "1.1" and k.has_equilibrium
    back = k.data.equilibrium
    for name, *_ in DATASETS:
        a, b = np.asarray(getattr(e, name)), np.asarray(getattr(back, name))
        if a.dtype == object or a.dtype.kind == "U":
            assert a.astype(str).tolist() == b.tolist(), name
        else:
            np.testing.assert_array_equal(a, b, err_msg=name)
    assert back.hot_temperature_K == e.hot_temperature_K
    pressures, dens, se = k.equilibrium_branch(0)
    np.testing.assert_array_equal(dens, e.density_per_nm3[0])
    np.testing.assert_array_equal(se, e.density_per_nm3_stderr[0])
    assert k.equilibrium_transitions(0)[0][j] == e.pressure_Pa[0, j]
    text = summary(k)
    assert f"transition p_eq = {e.pressure_Pa[0, j]:.4g}" in text
    assert "equilibrium transition in 1 (anchored" in text
    # a kernel without the group: schema 1.0, no branch, as before
    old = open_kernel(write_kernel(dataclasses.replace(small(), version=2), tmp_path / "k"))
    assert old.info["schema_version"] == "1.0" and old.data.equilibrium is None
    with pytest.raises(InputError, match="no equilibrium branch"):
        old.equilibrium_branch(0)


def test_a_wrong_shape_is_refused_by_the_writer(tmp_path):
    d = small()
    n_t, n_w = np.shape(d.henry_per_nm3_per_pa)
    n_p = np.shape(d.pressures_Pa)[1]
    d.equilibrium = EquilibriumBranch.empty(n_t, n_w, n_p + 1, 4, 200.0)
    with pytest.raises(InputError, match=r"equilibrium\.density_per_nm3: shape"):
        write_kernel(d, tmp_path)


# --- end to end ---------------------------------------------------------------------------


def _anchor_keys(cfg_path: Path) -> list[str]:
    tasks = list(output_dir(cfg_path).glob(f"{NAME}.tasks/*/*_eq*.npz"))
    return sorted(p.stem for p in tasks)


_REFERENCE: dict[str, object] = {}


def reference_build(factory: pytest.TempPathFactory):
    """The uninterrupted 1-worker build of the test config (once per session): (kernel,
    config path, its stdout)."""
    if "ref" not in _REFERENCE:
        cfg = copy_config(factory.mktemp("eq-reference"), CONFIG)
        res = run_build(cfg, "--workers", "1")
        check_ok(res)
        _REFERENCE["ref"] = (open_kernel(output_dir(cfg) / f"{NAME}.v1.h5"), cfg, res.stdout)
    return _REFERENCE["ref"]


def test_a_build_with_a_loop_resumes_bit_identical(tmp_path, tmp_path_factory):
    ref, ref_cfg, stdout = reference_build(tmp_path_factory)
    assert "equilibrium" in stdout and "anchor paths: 1 task(s), 14 points" in stdout
    e = ref.data.equilibrium
    # the 3 nm slit has a loop inside the grid (the precondition of this test) and got the
    # only anchor path; the blocked slit none
    assert e.has_loop.tolist() == [[False, True]], e.reason
    keys = _anchor_keys(ref_cfg)
    assert len(keys) == 1 and keys[0].startswith("t000_w001_eq")
    assert e.has_transition[0, 1], e.reason[0, 1]
    # the path's states: finite, and the anchor has a finite error
    assert np.all(np.isfinite(e.path_energy_K_per_nm3[0, 1]))
    assert np.isfinite(e.anchor_stderr[0, 1]) and e.anchor_stderr[0, 1] > 0

    # exact (Peterson & Gubbins 1987): between the desorption drop and the adsorption jump
    lo, hi = e.loop_pressure_range_Pa[0, 1]
    assert lo < e.pressure_Pa[0, 1] < hi
    # equivalently: the anchor lies between the top's grand potentials from integrating
    # either branch through its irreversible step (module docstring of gcmc.kernel.equilibrium)
    d = ref.data
    f = np.asarray(d.fugacities_Pa[0])
    kh = float(d.henry_per_nm3_per_pa[0, 1])
    ends = []
    for branch in ("adsorption", "desorption"):
        n = np.asarray(d.points[branch]["density_per_nm3"][0, 1])
        tail = (kh * f[0] + n[0]) / 2
        ends.append(-(tail + np.trapezoid(n, np.log(f))))
    margin = 4 * math.hypot(e.anchor_stderr[0, 1], e.anchor_integration_error[0, 1])
    assert ends[1] - margin <= e.anchor_beta_omega_per_nm3[0, 1] <= ends[0] + margin

    # interrupted at its anchor: the first pass is on disk, the build incomplete
    cfg = copy_config(tmp_path / "resumed", CONFIG)
    failed = run_build(cfg, "--workers", "1", GCMC_FAIL_TASK=keys[0])
    assert failed.returncode != 0 and keys[0] in failed.stderr
    assert not list(output_dir(cfg).glob("*.h5")) and _anchor_keys(cfg) == []
    # resumed: only the anchor runs; the kernel is the uninterrupted one, bit for bit
    res = run_build(cfg, "--workers", "1")
    check_ok(res)
    assert "(2 task(s) reused from disk)" in res.stdout, res.stdout
    assert_same_kernel(ref.data, open_kernel(output_dir(cfg) / f"{NAME}.v1.h5").data)


@pytest.mark.slow
@pytest.mark.mpi
@pytest.mark.skipif(shutil.which("mpiexec") is None, reason="mpiexec not found on PATH")
def test_an_mpi_build_gives_the_same_equilibrium_branch(tmp_path, tmp_path_factory):
    # the anchor round goes through the same queue under MPI (2 ranks): the same kernel
    pytest.importorskip("mpi4py")
    ref, _, _ = reference_build(tmp_path_factory)
    cfg = copy_config(tmp_path / "mpi", CONFIG)
    res = run_build(cfg, mpi_ranks=2)
    check_ok(res)
    assert "2 MPI ranks" in res.stdout, res.stdout
    assert_same_kernel(ref.data, open_kernel(output_dir(cfg) / f"{NAME}.v1.h5").data)
