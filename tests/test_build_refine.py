"""Builds that refine themselves (a ``[target]`` table): the real command line in a subprocess
on copies of ``tests/configs/refine.toml`` (4 widths x 5 pressures, short ladders, one
refinement round; seconds of simulation), inside pytest's ``tmp_path``.

"Identical" is :func:`test_build_resume.assert_same_kernel` (bit for bit except timing and
place). The refinement's provenance records CPU seconds (timing) and is compared without
them; everything else in it (rounds, widths, reruns, what still fails) must match.
"""

from __future__ import annotations

import copy
import re
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from test_build_resume import (
    BUILD_TIMEOUT_S,
    assert_same_kernel,
    check_ok,
    copy_config,
    kernel_files,
    kill_tree,
    output_dir,
    read_kernel,
    run_build,
    start_build,
    subprocess_env,
)

CONFIGS = Path(__file__).resolve().parent / "configs"
REFINE = CONFIGS / "refine.toml"
NAME = "refine-methane"
GRID = [0.80, 1.00, 1.40, 2.00]


def without_timing(data: Any) -> Any:
    """A copy whose refinement record has no measured seconds (they differ between runs)."""
    out = copy.copy(data)
    prov = copy.deepcopy(data.provenance)
    ref = prov.get("refinement")
    if ref:
        ref.pop("cpu_seconds", None)
        for r in ref["rounds"]:
            r.pop("cpu_seconds_before", None)
            r.pop("estimated_cpu_seconds", None)
    out.provenance = prov
    return out


def same_refined_kernel(a: Any, b: Any) -> None:
    assert_same_kernel(without_timing(a), without_timing(b))


def round_files(cfg: Path) -> list[Path]:
    """Task files of refinement rounds: added widths (t*_h*) and point reruns (*_b*p*s*)."""
    tasks = output_dir(cfg).glob(f"{NAME}.tasks/*/*.npz")
    return sorted(p for p in tasks if "_h" in p.stem or re.search(r"_b\dp\d+s\d", p.stem))


_REF: dict[str, Any] = {}


@pytest.fixture
def reference(tmp_path_factory: pytest.TempPathFactory) -> Any:
    """The uninterrupted refined build (2 workers), once per session."""
    if "ref" not in _REF:
        cfg = copy_config(tmp_path_factory.mktemp("refine-reference"), REFINE)
        res = run_build(cfg, "--workers", "2")
        check_ok(res)
        _REF["ref"] = (read_kernel(cfg, NAME), res, cfg)
    return _REF["ref"]


def test_refined_build_records_what_it_did(reference: Any) -> None:
    data, res, cfg = reference
    ref = data.provenance["refinement"]
    assert data.provenance["target"]["target_rel_stderr"] == 0.05
    # the config's widths are all there, the added ones come from round 1
    h = list(np.round(data.widths_H_nm, 6))
    assert set(GRID) <= set(h) and h == sorted(h)
    assert len(ref["rounds"]) == 1 and ref["widths_final_H_nm"] == h
    added = {a["H_nm"] for a in ref["rounds"][0]["widths_added"]}
    assert added == set(h) - set(GRID)
    assert all(a["why"] for a in ref["rounds"][0]["widths_added"])
    for rr in ref["rounds"][0]["reruns"]:
        assert rr["method"] and rr["effort"] >= 2 and rr["why"]
    # the check's verdict at the end ("not judged", with the reason, when the check cannot
    # judge a kernel this coarse: its round trip needs a finite two-pore separation)
    assert ref["stop"] and ref["check"]["verdict"] in ("pass", "warn", "fail", "not judged")
    if ref["check"]["verdict"] == "not judged":
        assert ref["check"]["measured"]["error"]
    # the summary table and `gcmc show` say it
    assert "refinement" in res.stdout and "stopped:" in res.stdout
    from gcmc.cli.kernel import summary
    from gcmc.kernel.reader import open_kernel

    shown = summary(open_kernel(kernel_files(cfg, NAME)[0]))
    assert "refinement" in shown and "round 1:" in shown and "target" in shown


def test_check_uses_the_stored_target(reference: Any) -> None:
    """`gcmc check KERNEL` takes the stored target (the point-error line shows its 0.05)."""
    import subprocess
    import sys

    _, _, cfg = reference
    path = kernel_files(cfg, NAME)[0]
    out = subprocess.run(
        [sys.executable, "-m", "gcmc.cli", "check", str(path)],
        capture_output=True,
        text=True,
        env=subprocess_env(),
        timeout=BUILD_TIMEOUT_S,
    )
    assert "target (stored in the kernel" in out.stdout, out.stdout + out.stderr
    assert "pass <= 0.05" in out.stdout  # the stored point-error target, not the default 0.02
    over = subprocess.run(
        [sys.executable, "-m", "gcmc.cli", "check", str(path), "--target-rel-error", "0.03"],
        capture_output=True,
        text=True,
        env=subprocess_env(),
        timeout=BUILD_TIMEOUT_S,
    )
    assert "pass <= 0.03" in over.stdout  # options override


def test_kill_mid_round_then_resume_gives_the_same_kernel(tmp_path: Path, reference: Any) -> None:
    cfg = copy_config(tmp_path, REFINE)
    proc = start_build(cfg, "--workers", "1")
    deadline = time.monotonic() + BUILD_TIMEOUT_S
    while not round_files(cfg):
        assert proc.poll() is None, f"build ended before round 1:\n{proc.communicate()}"
        assert time.monotonic() < deadline, "no round-1 task file appeared"
        time.sleep(0.02)
    kill_tree(proc)
    n_round = len(reference[0].provenance["refinement"]["rounds"][0]["widths_added"]) + len(
        reference[0].provenance["refinement"]["rounds"][0]["reruns"]
    )
    assert 1 <= len(round_files(cfg)) < n_round, "not interrupted mid-round"
    assert not kernel_files(cfg, NAME)
    check_ok(run_build(cfg, "--workers", "2"))
    same_refined_kernel(reference[0], read_kernel(cfg, NAME))


def test_damaged_task_file_is_recomputed_in_the_same_run(tmp_path: Path, reference: Any) -> None:
    cfg = copy_config(tmp_path, REFINE)
    check_ok(run_build(cfg, "--workers", "2"))
    for k in kernel_files(cfg, NAME):
        k.unlink()
    victim = next(output_dir(cfg).glob(f"{NAME}.tasks/*/t000_w001.npz"))
    raw = bytearray(victim.read_bytes())
    raw[len(raw) // 2] ^= 0xFF
    victim.write_bytes(bytes(raw))
    res = run_build(cfg, "--workers", "2")
    check_ok(res)
    log = (output_dir(cfg) / f"{NAME}.log").read_text()
    assert "damaged or missing task file(s) recomputed: t000_w001" in log
    same_refined_kernel(reference[0], read_kernel(cfg, NAME))


def test_budget_stops_the_loop_and_the_summary_says_so(tmp_path: Path) -> None:
    text = REFINE.read_text().replace("cpu_hours = 0.2", "cpu_hours = 0.0003")
    text = text.replace("cpu_hours_per_point = 0.02", "cpu_hours_per_point = 0.0001")
    text = text.replace("max_rounds = 1", "max_rounds = 5")
    cfg = copy_config(tmp_path, text=text)
    res = run_build(cfg, "--workers", "2")
    check_ok(res)
    ref = read_kernel(cfg, NAME).provenance["refinement"]
    assert "budget" in ref["stop"], ref["stop"]
    assert re.search(r"stopped: budget", res.stdout), res.stdout
    assert ref["still_failing"], "what the budget left open is listed"


def test_refine_off_builds_exactly_the_grid(tmp_path: Path) -> None:
    text = REFINE.read_text().replace("\n[target]\n", "\n[target]\nrefine = false\n")
    cfg = copy_config(tmp_path, text=text)
    res = run_build(cfg, "--workers", "2")
    check_ok(res)
    data = read_kernel(cfg, NAME)
    assert list(data.widths_H_nm) == GRID
    assert "refinement" not in data.provenance and "target" in data.provenance
    assert "refinement" not in res.stdout
    assert not round_files(cfg)


def _mpi_ready() -> bool:
    import shutil

    try:
        import mpi4py  # noqa: F401
    except ImportError:
        return False
    return shutil.which("mpiexec") is not None


@pytest.mark.mpi
@pytest.mark.skipif(not _mpi_ready(), reason="mpiexec or mpi4py not available")
def test_mpi_refined_build_gives_the_pool_kernel(tmp_path: Path, reference: Any) -> None:
    """Rounds under `mpiexec -n 2` (rank 0 plans, every rank takes tasks from the shared
    counter) end with the kernel of the local pool."""
    cfg = copy_config(tmp_path, REFINE)
    res = run_build(cfg, mpi_ranks=2)
    check_ok(res)
    assert "2 MPI ranks" in res.stdout
    log = (output_dir(cfg) / f"{NAME}.log").read_text()
    assert re.search(r"rank 1 task t000_\w+_b\dp\d+s\d done", log), "rank 1 ran round-1 tasks"
    same_refined_kernel(reference[0], read_kernel(cfg, NAME))


DENSE = (
    (Path(__file__).parent / "configs" / "dense_argon.toml").read_text()
    + """
[target]
cpu_hours = 0.05
cpu_hours_per_point = 0.01
max_rounds = 6
"""
)


@pytest.mark.slow
def test_dense_subcritical_build_escalates_to_the_certified_step(tmp_path: Path) -> None:
    """Argon at 87.3 K in a 3 sigma pore (a filled, frozen-prone pore; ~50 s on one core):
    moves this short leave both points flagged, so they climb every step of STEPS, one per
    round, and then the certified step with what their reruns left of the per-point budget;
    the provenance and the summary name the method, and the points stay flagged (not
    certified in this budget) rather than being passed."""
    from gcmc.pipeline.escalation import CERTIFIED, STEPS

    cfg = copy_config(tmp_path, text=DENSE)
    res = run_build(cfg, "--workers", "1")
    check_ok(res)
    data = read_kernel(cfg, "dense-argon")
    ref = data.provenance["refinement"]
    methods = [{x["method"] for x in r["reruns"]} for r in ref["rounds"]]
    assert methods == [{s.method} for s in STEPS] + [{CERTIFIED.method}], methods
    per_point = 0.01 * 3600.0
    for v in ref["points_rerun"].values():
        assert v["method"] == CERTIFIED.method and v["step"] == len(STEPS) + 1
        assert 0.0 < v["cpu_budget_s"] < per_point  # what the earlier reruns left
    assert "certified tempering" in res.stdout
    flags = data.flags["adsorption"][0, 0]
    assert not data.points["adsorption"]["converged"][0, 0].any()
    assert all("budget_spent" in str(f) for f in flags), flags
