"""Builds are reproducible and robust: any number of workers, a kill -9 and a rerun, a second
build on the same output, a failing task and a bad config.

Every build here runs the real command line (``python -m gcmc.cli build``) in a subprocess on
a copy of ``tests/configs/tiny.toml`` (5 tasks, about a second of simulation) or, where a
build must be caught mid-run, ``tests/configs/resume.toml`` (6 tasks, ~15 s), inside pytest's
``tmp_path``. "Identical" means :func:`assert_same_kernel`: every field of the
:class:`gcmc.kernel_data.KernelData` read back by :func:`gcmc.reader.open_kernel` is equal bit
for bit (numpy arrays: same dtype, shape and bytes, so NaNs must match too; fit records field
by field; dicts recursively), except the fields that record *when, where and how long*:

* ``task_seconds`` and ``points[branch]["seconds"]`` (measured run times),
* ``provenance["created_utc"]``, ``["host"]``, ``["platform"]`` and ``["config_path"]``
  (each build runs on its own copy of the config, in its own folder).

This is the project's reproducibility contract (see gcmc/pipeline/tasks.py): a task's random stream
depends only on the config's seed and the task's coordinates, never on the order of work.
"""

from __future__ import annotations

import dataclasses
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
CONFIGS = Path(__file__).resolve().parent / "configs"
TINY = CONFIGS / "tiny.toml"
TINY_NAME = "tiny-methane"
TINY_TASKS = 5
#: A longer build (~15 s of simulation) for the kill -9 and lock tests: between its first task
#: file and its end there are seconds, not milliseconds, to interrupt it.
RESUME = CONFIGS / "resume.toml"
RESUME_NAME = "resume-methane"
RESUME_TASKS = 6
#: Fields of KernelData that record time, place or host and legitimately differ between builds.
TIMING_FIELDS = {"task_seconds"}
POINT_TIMING_FIELDS = {"seconds"}
PROVENANCE_VOLATILE = {"created_utc", "host", "platform", "config_path"}
BUILD_TIMEOUT_S = 600

# --- helpers (also used by test_build_mpi.py) ---------------------------------------------


def copy_config(folder: Path, src: Path = TINY, text: str | None = None) -> Path:
    """Copy a test config into ``folder`` (its ``output`` is relative, so builds stay there)."""
    folder.mkdir(parents=True, exist_ok=True)
    dst = folder / "build.toml"
    dst.write_text(src.read_text() if text is None else text)
    return dst


def subprocess_env(**extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PMI_", "OMPI_", "PMIX_"))}
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    env.pop("GCMC_FAIL_TASK", None)
    env.update(extra)
    return env


def build_command(cfg: Path, *args: str, mpi_ranks: int = 0) -> list[str]:
    cmd = [sys.executable, "-m", "gcmc.cli", "build", str(cfg), "--no-progress", *args]
    if mpi_ranks:
        cmd = [shutil.which("mpiexec") or "mpiexec", "-n", str(mpi_ranks), *cmd]
    return cmd


def run_build(cfg: Path, *args: str, mpi_ranks: int = 0, **env: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        build_command(cfg, *args, mpi_ranks=mpi_ranks),
        cwd=cfg.parent,
        env=subprocess_env(**env),
        capture_output=True,
        text=True,
        timeout=BUILD_TIMEOUT_S,
    )


def start_build(cfg: Path, *args: str, mpi_ranks: int = 0, **env: str) -> subprocess.Popen:
    """Start a build in the background (in a session of its own, away from pytest's)."""
    return subprocess.Popen(
        build_command(cfg, *args, mpi_ranks=mpi_ranks),
        cwd=cfg.parent,
        env=subprocess_env(**env),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )


def _proc_stat(pid: int) -> tuple[str, int] | None:
    """(state, parent pid) of a live process, from /proc/PID/stat; None when it is gone."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = stat[stat.rindex(")") + 2 :].split()
    return fields[0], int(fields[1])


def process_tree(root: int) -> set[int]:
    """``root`` and all its live descendants."""
    children: dict[int, list[int]] = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            st = _proc_stat(int(entry.name))
            if st is not None:
                children.setdefault(st[1], []).append(int(entry.name))
    tree, todo = set(), [root]
    while todo:
        pid = todo.pop()
        if pid not in tree:
            tree.add(pid)
            todo.extend(children.get(pid, []))
    return tree


def _cmdline(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
    except OSError:
        return ""


def _signal(pids: set[int], sig: int) -> None:
    for pid in pids:
        try:
            os.kill(pid, sig)
        except ProcessLookupError:
            pass


def kill_tree(proc: subprocess.Popen) -> None:
    """SIGKILL the build and every process it started: pool workers, and under MPI the
    launcher's proxies and ranks (Hydra puts each in a session of its own, so killing the
    process group is not enough). The tree is frozen with SIGSTOP first so that no process
    escapes by being re-parented or forked while we kill; returns when none is left."""
    tree: set[int] = set()
    while True:  # freeze until the tree stops growing
        now = process_tree(proc.pid)
        _signal(now - tree, signal.SIGSTOP)
        if now <= tree:
            break
        tree |= now
    _signal(tree, signal.SIGKILL)
    proc.wait(timeout=30)
    deadline = time.monotonic() + 30
    while any((st := _proc_stat(pid)) is not None and st[0] != "Z" for pid in tree):
        assert time.monotonic() < deadline, f"processes survived SIGKILL: {tree}"
        time.sleep(0.05)
    proc.communicate(timeout=10)


def output_dir(cfg: Path) -> Path:
    return cfg.parent / "out"


def task_files(cfg: Path, name: str = TINY_NAME) -> list[Path]:
    return sorted(output_dir(cfg).glob(f"{name}.tasks/*/t*_w*.npz"))


def kernel_files(cfg: Path, name: str = TINY_NAME) -> list[Path]:
    return sorted(output_dir(cfg).glob(f"{name}.v*.h5"))


def check_ok(res: subprocess.CompletedProcess) -> None:
    assert res.returncode == 0, f"build failed ({res.returncode}):\n{res.stdout}\n{res.stderr}"


def read_kernel(cfg: Path, name: str = TINY_NAME) -> Any:
    from gcmc.kernel.reader import open_kernel

    files = kernel_files(cfg, name)
    assert len(files) == 1, f"expected one kernel file, found {files}"
    return open_kernel(files[0]).data


def kill_when_tasks_on_disk(
    proc: subprocess.Popen, cfg: Path, n_tasks: int, name: str = TINY_NAME
) -> int:
    """Wait until at least one task file exists, then kill the build; returns how many task
    files were on disk. Fails if the build ended before it could be interrupted."""
    deadline = time.monotonic() + BUILD_TIMEOUT_S
    while not task_files(cfg, name):
        assert proc.poll() is None, f"build ended before any task file:\n{proc.communicate()}"
        assert time.monotonic() < deadline, "no task file appeared"
        time.sleep(0.02)
    kill_tree(proc)
    done = len(task_files(cfg, name))
    # The interruption must be real: tasks are missing and no kernel was written.
    assert 1 <= done < n_tasks, f"{done} of {n_tasks} tasks on disk: not interrupted"
    assert not kernel_files(cfg, name)
    return done


def _same(a: Any, b: Any, where: str) -> None:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        a, b = np.asarray(a), np.asarray(b)
        assert a.dtype == b.dtype and a.shape == b.shape, (
            f"{where}: {a.dtype}{a.shape} != {b.dtype}{b.shape}"
        )
        if a.dtype == object:
            assert a.tolist() == b.tolist(), f"{where}: differs"
        else:
            # bit for bit: the same bytes, so also the same NaNs and signed zeros
            same = np.ascontiguousarray(a).tobytes() == np.ascontiguousarray(b).tobytes()
            if not same:
                diff = np.argwhere(a != b)
                raise AssertionError(f"{where}: differs at {diff[:5].tolist()}")
    elif dataclasses.is_dataclass(a):
        assert type(a) is type(b), where
        for f in dataclasses.fields(a):
            _same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
    elif isinstance(a, dict):
        assert isinstance(b, dict) and sorted(a) == sorted(b), (
            f"{where}: keys {sorted(a)} != {sorted(b)}"
        )
        for k in a:
            _same(a[k], b[k], f"{where}[{k!r}]")
    elif isinstance(a, list | tuple):
        assert isinstance(b, list | tuple) and len(a) == len(b), f"{where}: lengths differ"
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _same(x, y, f"{where}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert np.float64(a).tobytes() == np.float64(b).tobytes(), f"{where}: {a!r} != {b!r}"
    else:
        assert a == b, f"{where}: {a!r} != {b!r}"


def assert_same_kernel(a: Any, b: Any) -> None:
    """Bit-for-bit equality of two KernelData, except timing and place (module docstring)."""
    for f in dataclasses.fields(a):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if f.name in TIMING_FIELDS:
            continue
        if f.name == "points":
            x = {
                br: {k: v for k, v in d.items() if k not in POINT_TIMING_FIELDS}
                for br, d in x.items()
            }
            y = {
                br: {k: v for k, v in d.items() if k not in POINT_TIMING_FIELDS}
                for br, d in y.items()
            }
        if f.name == "provenance":
            x = {k: v for k, v in x.items() if k not in PROVENANCE_VOLATILE}
            y = {k: v for k, v in y.items() if k not in PROVENANCE_VOLATILE}
        _same(x, y, f.name)


_REFERENCE: dict[str, Any] = {}


def reference_kernel(factory: pytest.TempPathFactory, which: str = "tiny") -> Any:
    """The uninterrupted build of tiny.toml (1 worker) or resume.toml (2 workers: its equality
    with 1 worker is what the tiny tests check), built once per test session."""
    if which not in _REFERENCE:
        src, name, n_tasks, workers = {
            "tiny": (TINY, TINY_NAME, TINY_TASKS, "1"),
            "resume": (RESUME, RESUME_NAME, RESUME_TASKS, "2"),
        }[which]
        cfg = copy_config(factory.mktemp(f"reference-{which}"), src)
        check_ok(run_build(cfg, "--workers", workers))
        data = read_kernel(cfg, name)
        assert data.points["adsorption"]["density_per_nm3"].shape == (1, n_tasks, 5)
        _REFERENCE[which] = data
    return _REFERENCE[which]


@pytest.fixture
def reference(tmp_path_factory: pytest.TempPathFactory) -> Any:
    return reference_kernel(tmp_path_factory)


@pytest.fixture
def resume_reference(tmp_path_factory: pytest.TempPathFactory) -> Any:
    return reference_kernel(tmp_path_factory, "resume")


# --- tests -------------------------------------------------------------------------------------


def test_comparison_sees_a_one_bit_change(reference: Any) -> None:
    """The comparison used everywhere below is not blind: flip one bit of one density."""
    assert_same_kernel(reference, reference)
    other = dataclasses.replace(
        reference,
        points={br: {k: v.copy() for k, v in d.items()} for br, d in reference.points.items()},
    )
    n = other.points["adsorption"]["density_per_nm3"]
    i = tuple(np.argwhere(np.isfinite(n) & (n > 0))[0])
    n[i] = np.nextafter(n[i], np.inf)
    with pytest.raises(AssertionError, match="density_per_nm3"):
        assert_same_kernel(reference, other)


def test_two_workers_give_the_one_worker_kernel(tmp_path: Path, reference: Any) -> None:
    cfg = copy_config(tmp_path)
    proc = start_build(cfg, "--workers", "2")
    workers_seen = 0  # the pool really runs: two spawned worker processes at the same time
    while proc.poll() is None:
        kids = [_cmdline(pid) for pid in process_tree(proc.pid) - {proc.pid}]
        workers_seen = max(workers_seen, sum("spawn_main" in c for c in kids))
        time.sleep(0.1)
    out, err = proc.communicate()
    assert proc.returncode == 0, f"build failed:\n{out}\n{err}"
    assert "2 worker(s)" in out
    assert workers_seen == 2
    assert_same_kernel(reference, read_kernel(cfg))


def test_kill_9_then_rerun_gives_the_same_kernel(tmp_path: Path, resume_reference: Any) -> None:
    cfg = copy_config(tmp_path, RESUME)
    proc = start_build(cfg, "--workers", "2")
    done = kill_when_tasks_on_disk(proc, cfg, RESUME_TASKS, RESUME_NAME)
    lock = output_dir(cfg) / f"{RESUME_NAME}.lock"
    assert lock.exists(), "a killed build leaves its lock behind; the rerun must take it over"
    res = run_build(cfg, "--workers", "2")
    check_ok(res)
    m = re.search(r"\((\d+) task\(s\) reused from disk\)", res.stdout)
    assert m and int(m.group(1)) >= done, res.stdout
    assert not lock.exists()
    assert_same_kernel(resume_reference, read_kernel(cfg, RESUME_NAME))


def test_second_build_on_the_same_output_is_refused(tmp_path: Path) -> None:
    # the first build must outlast the second's start-up (seconds on a loaded machine): the
    # longer config; it is killed once the second has been refused
    cfg = copy_config(tmp_path, RESUME)
    lock = output_dir(cfg) / f"{RESUME_NAME}.lock"
    first = start_build(cfg, "--workers", "1")
    try:
        deadline = time.monotonic() + BUILD_TIMEOUT_S
        while not lock.exists():
            assert first.poll() is None, f"first build ended early:\n{first.communicate()}"
            assert time.monotonic() < deadline
            time.sleep(0.02)
        second = run_build(cfg, "--workers", "1")
        assert first.poll() is None, "the first build must still be running for this test"
        assert second.returncode == 2, second
        lines = second.stderr.strip().splitlines()
        assert len(lines) == 1, second.stderr
        assert str(lock) in lines[0] and "another build" in lines[0]
        assert str(first.pid) in lines[0], "the message names the lock's owner"
        # the refused build did not disturb the running one's lock
        assert lock.read_text().split()[1] == str(first.pid)
    finally:
        kill_tree(first)


def test_failed_task_is_reported_and_retried(tmp_path: Path, reference: Any) -> None:
    cfg = copy_config(tmp_path)
    bad = "t000_w002"  # H = 1.00 nm in tiny.toml
    res = run_build(cfg, "--workers", "2", GCMC_FAIL_TASK=bad)
    assert res.returncode == 1, res
    # reported with its coordinates and the cause, and what is missing
    assert f"task {bad} (T = 298.15 K, H = 1 nm) failed" in res.stderr
    assert "failed on purpose" in res.stderr
    assert f"1 of {TINY_TASKS} task(s) failed or missing ({bad})" in res.stderr
    assert "Rerun the same command" in res.stderr
    # the other tasks finished; nothing was assembled from an incomplete grid
    keys = {p.stem for p in task_files(cfg)}
    assert len(keys) == TINY_TASKS - 1 and bad not in keys
    fail = json.loads(
        next(output_dir(cfg).glob(f"{TINY_NAME}.tasks/*/{bad}.failed.json")).read_text()
    )
    assert "RuntimeError" in fail["traceback"]
    assert not kernel_files(cfg)
    # the rerun runs only the missing task, and the kernel is the uninterrupted one
    res = run_build(cfg, "--workers", "2")
    check_ok(res)
    assert f"({TINY_TASKS - 1} task(s) reused from disk)" in res.stdout
    assert not list(output_dir(cfg).glob(f"{TINY_NAME}.tasks/*/*.failed.json"))
    assert_same_kernel(reference, read_kernel(cfg))


# (description, substitution in tiny.toml (regex, replacement), words the message must contain)
BAD_CONFIGS = [
    (
        "wrong type",
        (r"production_moves = 20000", 'production_moves = "lots"'),
        ["sampling.production_moves", "integer"],
    ),
    ("missing field", (r"(?m)^K = \[298\.15\]\n", ""), ["temperatures.K", "missing"]),
    ("unknown probe", (r'"methane"', '"unobtainium"'), ["probe", "unobtainium", "unknown"]),
    ("non-positive temperature", (r"K = \[298\.15\]", "K = [0.0]"), ["temperatures.K[0]", "> 0"]),
    (
        "non-positive pressure",
        (r"from_Pa = 1\.0e4", "from_Pa = -1.0e4"),
        ["pressures.from_Pa", "> 0"],
    ),
    (
        "bias threshold out of range",
        (r"production_moves = 20000", "production_moves = 20000\nbias_threshold = 1.5"),
        ["sampling.bias_threshold", "(0, 1)"],
    ),
    ("duplicate widths", (r"0\.80, 1\.00", "1.00, 1.00"), ["widths", "duplicate"]),
    ("unsorted widths", (r"0\.80, 1\.00", "1.00, 0.80"), ["widths", "sorted"]),
    (
        "cutoff too large for the box",
        (r"(?m)^\[probe\]", "[model]\ncutoff_nm = 2.0\nbox_nm = 3.0\n\n[probe]"),
        ["model.cutoff_nm", "half the lateral box"],
    ),
]


@pytest.mark.parametrize(("what", "sub", "words"), BAD_CONFIGS, ids=[b[0] for b in BAD_CONFIGS])
def test_bad_config_exits_2_with_one_line_and_writes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture, what: str, sub: tuple[str, str], words: list[str]
) -> None:
    from gcmc.cli import main

    text, n = re.subn(sub[0], sub[1], TINY.read_text())
    assert n == 1, f"substitution for {what!r} did not apply"
    cfg = copy_config(tmp_path, text=text)
    before = sorted(p.name for p in tmp_path.iterdir())
    rc = main(["build", str(cfg), "--no-progress", "--workers", "1"])
    err = capsys.readouterr().err
    assert rc == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    for w in words:
        assert w in lines[0], f"{w!r} not in {lines[0]!r}"
    assert not output_dir(cfg).exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == before


@pytest.mark.parametrize(
    ("lock_line", "job", "restart", "taken_over"),
    [
        # an earlier run of this SLURM job (requeued, now on another node): it has ended
        ("node-a 12345 slurm:4242.0", "4242", "1", True),
        # the same run of the same job, another job, or no SLURM at all: the owner on node-a
        # may be alive, and this host cannot check
        ("node-a 12345 slurm:4242.1", "4242", "1", False),
        ("node-a 12345 slurm:999.0", "4242", "1", False),
        ("node-a 12345", "4242", "1", False),
        ("node-a 12345 slurm:4242.0", None, None, False),
    ],
)
def test_lock_takeover_across_slurm_requeue(
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    lock_line: str,
    job: str | None,
    restart: str | None,
    taken_over: bool,
) -> None:
    from gcmc.errors import InputError
    from gcmc.pipeline.runner import BuildLock

    for var, val in (("SLURM_JOB_ID", job), ("SLURM_RESTART_COUNT", restart)):
        if val is None:
            monkeypatch.delenv(var, raising=False)
        else:
            monkeypatch.setenv(var, val)
    path = tmp_path / "k.lock"
    path.write_text(lock_line + "\n")
    lock = BuildLock(path)
    if taken_over:
        lock.acquire()
        assert path.read_text().split()[1:] == [str(os.getpid()), f"slurm:{job}.{restart}"]
        lock.release()
        assert not path.exists()
    else:
        with pytest.raises(InputError, match="another build"):
            lock.acquire()
        assert path.read_text() == lock_line + "\n"
