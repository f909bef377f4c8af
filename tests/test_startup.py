"""Start-up: a new process evaluates its first state point from numba's on-disk cache, without
recompiling the engine, and reports what loading it cost."""

from __future__ import annotations

import json
import subprocess
import sys

PROBE = """
import json, time
from gcmc.simulation import warm_up
import gcmc.engine as E
t = warm_up()
s = E.run_moves.stats
print(json.dumps({"seconds": t, "hits": sum(s.cache_hits.values()),
                  "misses": sum(s.cache_misses.values())}))
"""


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
