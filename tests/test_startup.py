"""Start-up: a new process evaluates its first state point from numba's on-disk cache, without
recompiling the engine, and reports what loading it cost."""

from __future__ import annotations

import json
import subprocess
import sys

PROBE = """
import json, time
from gcmc.sampling.box import warm_up
import gcmc.sampling.engine as E
t = warm_up()
s = E.run_moves.stats
print(json.dumps({"seconds": t, "hits": sum(s.cache_hits.values()),
                  "misses": sum(s.cache_misses.values())}))
"""


TRAJECTORY = """
import json
import numpy as np
import gcmc.sampling.engine as E
from gcmc.physics.model import BULK, SLIT, PoreModel, Probe, Solid
from gcmc.sampling.box import Box
probe = Probe(name="m", epsilon_k=148.0, sigma_nm=0.373)
out = {}
for geom, k in ((SLIT, 1), (SLIT, 16), (BULK, 1)):
    model = PoreModel(probe=probe, solid=Solid(), geometry=geom, cutoff_nm=1.119, box_nm=3.73,
                      width_nm=0.8)
    box = Box(model, 298.15, 5.0 if geom == SLIT else 1.0)
    box.set_insertion_trials(k)
    n, uff, usf = np.zeros(50, dtype=np.int64), np.zeros(50), np.zeros(50)
    box.run(20000, 400, n, uff, usf, 0, np.zeros(box.n_bins))
    out[f"{geom}-{k}"] = [n.tolist(), [x.hex() for x in uff], [x.hex() for x in usf]]
s = E.run_moves.stats
out["misses"] = sum(s.cache_misses.values())
print(json.dumps(out))
"""


def test_compiled_and_cached_engine_give_the_same_trajectory(tmp_path) -> None:
    """Exact requirement (bit-for-bit builds across processes): the process that compiles the
    engine into an empty cache and one that loads it from there run the same trajectories to
    the last bit. A compiled wrapper around the move loop once broke this (its linked copy of
    the loop rounded the fastmath sums differently), and pool and MPI builds differed from
    1-worker builds in the isosteric heat."""
    import os

    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path / "numba-cache"))

    def run() -> dict:
        out = subprocess.run(
            [sys.executable, "-c", TRAJECTORY],
            capture_output=True,
            text=True,
            timeout=600,
            check=True,
            env=env,
        )
        return json.loads(out.stdout.strip().splitlines()[-1])

    compiled, cached = run(), run()
    assert compiled.pop("misses") >= 1 and cached.pop("misses") == 0
    assert max(max(v[0]) for v in compiled.values()) > 10  # molecules were really moved
    assert compiled == cached


def _run() -> dict:
    out = subprocess.run(
        [sys.executable, "-c", PROBE], capture_output=True, text=True, timeout=600, check=True
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_second_process_loads_engine_from_cache() -> None:
    _run()  # first process: compiles if the cache is cold, and writes it
    second = _run()
    assert second["misses"] == 0, second
    assert second["hits"] >= 1, second


def test_point_reports_first_call_cost() -> None:
    from gcmc.cli import main  # noqa: F401  (import check only)

    out = subprocess.run(
        [
            sys.executable,
            "-m",
            "gcmc.cli",
            "point",
            "--probe",
            "argon",
            "--temperature",
            "300",
            "--width",
            "1.2",
            "--fugacity",
            "1e5",
            "--moves",
            "20000",
            "--json",
        ],
        capture_output=True,
        text=True,
        timeout=600,
        check=True,
    )
    payload = json.loads(out.stdout)
    assert payload["compile_or_cache_load_seconds"] > 0
    assert payload["seconds"] > 0  # wall time of the moves alone, compilation excluded
