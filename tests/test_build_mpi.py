"""Builds under MPI (``mpiexec -n 2 python -m gcmc.cli build``) give the kernel of a 1-worker
build, bit for bit, also after a kill -9 and a rerun. "Identical" is defined in
test_build_resume.py (every KernelData field except timing and place)."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from test_build_resume import (
    RESUME,
    RESUME_NAME,
    RESUME_TASKS,
    TINY_NAME,
    TINY_TASKS,
    assert_same_kernel,
    check_ok,
    copy_config,
    kernel_files,
    kill_when_tasks_on_disk,
    output_dir,
    read_kernel,
    reference_kernel,
    run_build,
    start_build,
    subprocess_env,
)

MPIEXEC = shutil.which("mpiexec")


def _mpi4py_missing() -> bool:
    try:
        import mpi4py  # noqa: F401
    except ImportError:
        return True
    return False


pytestmark = [
    pytest.mark.mpi,
    pytest.mark.skipif(MPIEXEC is None, reason="mpiexec not found on PATH (pip install mpich)"),
    pytest.mark.skipif(_mpi4py_missing(), reason="mpi4py is not installed"),
]


@pytest.fixture
def reference(tmp_path_factory: pytest.TempPathFactory) -> Any:
    return reference_kernel(tmp_path_factory)


@pytest.fixture
def resume_reference(tmp_path_factory: pytest.TempPathFactory) -> Any:
    return reference_kernel(tmp_path_factory, "resume")


def _rank_tasks(cfg: Path) -> dict[str, int]:
    """task key -> rank that finished it, from the build log."""
    log = (output_dir(cfg) / f"{TINY_NAME}.log").read_text()
    found = re.findall(r"rank (\d+) task (t\d{3}_w\d{3}) done", log)
    out: dict[str, int] = {}
    for rank, key in found:
        assert key not in out, f"task {key} was run twice"
        out[key] = int(rank)
    return out


def test_runner_detects_the_mpi_job() -> None:
    """MPICH's Hydra sets PMI_SIZE/PMI_RANK (OpenMPI: OMPI_COMM_WORLD_SIZE); the runner must
    see 2 ranks under mpiexec -n 2, and 1 outside it."""
    code = "from gcmc.pipeline.runner import mpi_world_size; print(mpi_world_size())"
    res = subprocess.run(
        [MPIEXEC, "-n", "2", sys.executable, "-c", code],
        env=subprocess_env(),
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert res.returncode == 0, res.stderr
    # each rank prints "2"; mpiexec may interleave the two lines ("22\n\n" was seen)
    assert "".join(res.stdout.split()) == "22", res.stdout
    res = subprocess.run(
        [sys.executable, "-c", code],
        env=subprocess_env(),
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert res.stdout.split() == ["1"]


def test_mpiexec_2_gives_the_one_worker_kernel(tmp_path: Path, reference: Any) -> None:
    cfg = copy_config(tmp_path)
    res = run_build(cfg, mpi_ranks=2)
    check_ok(res)
    assert "2 MPI ranks" in res.stdout
    assert_same_kernel(reference, read_kernel(cfg))
    ranks = _rank_tasks(cfg)
    assert len(ranks) == TINY_TASKS, "every task ran exactly once"
    assert set(ranks.values()) == {0, 1}, f"both ranks took tasks: {ranks}"


def test_mpi_kill_9_then_mpi_rerun_gives_the_same_kernel(
    tmp_path: Path, resume_reference: Any
) -> None:
    cfg = copy_config(tmp_path, RESUME)
    proc = start_build(cfg, mpi_ranks=2)
    done = kill_when_tasks_on_disk(proc, cfg, RESUME_TASKS, RESUME_NAME)
    res = run_build(cfg, mpi_ranks=2)
    check_ok(res)
    m = re.search(r"\((\d+) task\(s\) reused from disk\)", res.stdout)
    assert m and int(m.group(1)) >= done, res.stdout
    assert len(kernel_files(cfg, RESUME_NAME)) == 1
    assert_same_kernel(resume_reference, read_kernel(cfg, RESUME_NAME))


@pytest.mark.slow
def test_mpi_failed_task_on_any_rank_is_reported(tmp_path: Path, reference: Any) -> None:
    """A task that fails on whichever rank took it is reported by rank 0 with its
    coordinates; the others finish; the rerun (here with the local pool) completes."""
    cfg = copy_config(tmp_path)
    bad = "t000_w001"
    res = run_build(cfg, mpi_ranks=2, GCMC_FAIL_TASK=bad)
    assert res.returncode == 1, res
    assert f"task {bad} (T = 298.15 K, H = 0.8 nm) failed" in res.stderr
    assert len(_rank_tasks(cfg)) == TINY_TASKS - 1
    check_ok(run_build(cfg, "--workers", "2"))
    assert_same_kernel(reference, read_kernel(cfg))
