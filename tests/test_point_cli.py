"""`gcmc point`: the JSON record, in-process (gcmc.cli.main) and as a subprocess
(python -m gcmc.cli), and the refusal of bad input (exit code 2, one line on stderr)."""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

from gcmc.cli import main
from gcmc.physics.model import default_solid, get_probe
from gcmc.physics.units import BOLTZMANN_J_PER_K, NM3_PER_M3

pytestmark = pytest.mark.usefixtures("engine")

REPO = Path(__file__).resolve().parents[1]

REQUIRED_KEYS = (
    "molecules_mean",
    "molecules_stderr",
    "density_per_nm3",
    "density_per_nm3_stderr",
    "excess_density_per_nm3",
    "isosteric_heat_kJ_per_mol",
    "fugacity_Pa",
    "moves",
    "seconds",
    "model",
)

SLIT_ARGS = [
    "point",
    "--probe",
    "methane",
    "--temperature",
    "298.15",
    "--pressure",
    "2e6",
    "--width",
    "1.2",
    "--moves",
    "60000",
    "--seed",
    "5",
    "--json",
]


def run_main(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(args)
    out, err = capsys.readouterr()
    return code, out, err


def check_payload(d: dict, geometry: str, width: float | None) -> None:
    for key in REQUIRED_KEYS:
        assert key in d, key
    m = d["model"]
    probe = get_probe("methane")
    solid = default_solid()
    assert m["epsilon_k"] == probe.epsilon_k and m["sigma_nm"] == probe.sigma_nm
    for key in ("density_nm3", "interlayer_nm", "epsilon_k", "sigma_nm"):
        assert m["solid"][key] == getattr(solid, key)
    # default cutoff 3 sigma; default edge max(2 r_c, 10 sigma) rounded up to 0.01 nm
    assert m["cutoff_nm"] == pytest.approx(3 * probe.sigma_nm)
    edge = math.ceil(max(6 * probe.sigma_nm, 10 * probe.sigma_nm) * 100 - 1e-9) / 100
    lz = width if geometry == "slit" else edge
    assert m["box_nm"] == pytest.approx([edge, edge, lz])
    assert m["geometry"] == geometry
    # internal consistency of the record: density = N / (A w), w = H - sigma_ss (slit)
    vol = edge * edge * ((width - solid.sigma_nm) if geometry == "slit" else edge)
    assert d["density_per_nm3"] == pytest.approx(d["molecules_mean"] / vol, rel=1e-12)
    assert d["density_per_nm3_stderr"] == pytest.approx(d["molecules_stderr"] / vol, rel=1e-12)
    assert d["excess_density_per_nm3"] == pytest.approx(
        d["density_per_nm3"] - d["bulk_density_per_nm3"], rel=1e-12, abs=1e-12
    )
    assert d["molecules_mean"] > 0 and d["molecules_stderr"] > 0
    assert math.isfinite(d["isosteric_heat_kJ_per_mol"])
    # all trial moves: 60 000 per replica, two replicas by default, and the over-filled start
    # of the second replica (overfill at 20 z for half of the 12 000 equilibration moves)
    assert d["moves"] == 2 * 60_000 + 12_000 // 2 and d["seconds"] > 0


@pytest.fixture(scope="module")
def slit_record(engine: float) -> dict:
    """One in-process `gcmc point --json` run in a slit pore, shared by the tests below."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(SLIT_ARGS)
    assert code == 0, err.getvalue()
    return json.loads(out.getvalue())


def test_point_json_in_process(slit_record: dict) -> None:
    d = slit_record
    check_payload(d, "slit", 1.2)
    # Reference EOS (CoolProp) for methane at 2 MPa: phi < 1, so f < p.
    assert d["eos"] == "reference"
    assert 0.9 * 2e6 < d["fugacity_Pa"] < 2e6
    assert d["model"]["width_H_nm"] == 1.2
    assert d["model"]["width_w_nm"] == pytest.approx(1.2 - default_solid().sigma_nm)


def test_point_json_records_the_tail_correction_used(slit_record: dict) -> None:
    """The record must say which tail correction the run used (a record names the
    convention it used): the slab tail (Janecek 2006) in a slit by default."""
    assert "slab" in slit_record["model"]["tail_correction"].lower()
    # regression: the record said "none" for slit pores before commit 683b3cc


def test_point_json_subprocess_matches_in_process(slit_record: dict) -> None:
    """The same arguments give the same numbers in a fresh interpreter (one seed, one
    result), and stdout is exactly one JSON object."""
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.run(
        [sys.executable, "-m", "gcmc.cli", *SLIT_ARGS],
        cwd=REPO,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert proc.returncode == 0, proc.stderr
    sub = json.loads(proc.stdout)
    check_payload(sub, "slit", 1.2)
    here = slit_record
    for key in (
        "molecules_mean",
        "molecules_stderr",
        "density_per_nm3",
        "fugacity_Pa",
        "isosteric_heat_kJ_per_mol",
        "moves",
    ):
        assert sub[key] == here[key], key


def test_point_bulk_ideal_gas_limit(capsys: pytest.CaptureFixture[str]) -> None:
    """Bulk cube with the ideal-gas EOS: f = p and the bulk density is p/kT (exact); the
    record's excess density is the simulated minus that."""
    p, t = 1.0e5, 298.15
    code, out, err = run_main(
        [
            "point",
            "--probe",
            "methane",
            "--temperature",
            str(t),
            "--pressure",
            str(p),
            "--bulk",
            "--eos",
            "ideal",
            "--moves",
            "60000",
            "--json",
        ],
        capsys,
    )
    assert code == 0, err
    d = json.loads(out)
    check_payload(d, "bulk", None)
    assert d["fugacity_Pa"] == p
    assert "homogeneous" in d["model"]["tail_correction"]
    assert d["bulk_density_per_nm3"] == pytest.approx(
        p / (BOLTZMANN_J_PER_K * t) / NM3_PER_M3, rel=1e-12
    )


BAD_INPUTS = {
    "unknown probe": (
        ["--probe", "unobtainium", "--temperature", "300", "--pressure", "1e5", "--width", "1.0"],
        "unobtainium",
    ),
    "zero temperature": (
        ["--probe", "argon", "--temperature", "0", "--pressure", "1e5", "--width", "1.0"],
        "--temperature",
    ),
    "negative temperature": (
        ["--probe", "argon", "--temperature", "-87", "--pressure", "1e5", "--width", "1.0"],
        "--temperature",
    ),
    "zero pressure": (
        ["--probe", "argon", "--temperature", "87.3", "--pressure", "0", "--width", "1.0"],
        "--pressure",
    ),
    "negative pressure": (
        ["--probe", "argon", "--temperature", "87.3", "--pressure", "-5", "--width", "1.0"],
        "--pressure",
    ),
    "negative width": (
        ["--probe", "argon", "--temperature", "87.3", "--pressure", "1e4", "--width", "-1.0"],
        "--width",
    ),
    "cutoff beyond half the box": (
        [
            "--probe",
            "argon",
            "--temperature",
            "87.3",
            "--pressure",
            "1e4",
            "--width",
            "1.0",
            "--box",
            "3.0",
            "--cutoff",
            "1.6",
        ],
        "--cutoff",
    ),
    "NaN temperature": (
        ["--probe", "argon", "--temperature", "nan", "--pressure", "1e4", "--width", "1.0"],
        "--temperature",
    ),
    "NaN pressure": (
        ["--probe", "argon", "--temperature", "87.3", "--pressure", "nan", "--width", "1.0"],
        "--pressure",
    ),
    "NaN width": (
        ["--probe", "argon", "--temperature", "87.3", "--pressure", "1e4", "--width", "nan"],
        "--width",
    ),
}


@pytest.mark.parametrize("name", sorted(BAD_INPUTS))
def test_point_bad_input_exit_code_2_one_line(
    name: str, capsys: pytest.CaptureFixture[str]
) -> None:
    args, field = BAD_INPUTS[name]
    code, out, err = run_main(["point", *args, "--moves", "20000", "--json"], capsys)
    assert code == 2
    assert out == ""  # nothing half-written
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("gcmc point: error:") and field in lines[0], lines[0]


def test_point_bad_input_subprocess() -> None:
    """The same refusal through the console entry point in a fresh interpreter."""
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    args, field = BAD_INPUTS["negative width"]
    proc = subprocess.run(
        [sys.executable, "-m", "gcmc.cli", "point", *args, "--json"],
        cwd=REPO,
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 2
    assert proc.stdout == ""
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and field in lines[0], proc.stderr
