"""The Python API (gcmc.api): one point, and build -> open -> check -> diff, returning result
objects and printing nothing."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import gcmc
from gcmc import api
from gcmc.cli import main
from gcmc.errors import InputError
from gcmc.physics.henry import pore_limit
from gcmc.physics.model import default_solid

pytestmark = pytest.mark.usefixtures("engine")

REPO = Path(__file__).resolve().parents[1]


def test_package_exports_the_api_lazily() -> None:
    """`import gcmc` stays light (no gcmc.api, no numba); gcmc.run_point loads the API."""
    code = (
        "import sys, gcmc\n"
        "before = 'gcmc.api' in sys.modules or 'numba' in sys.modules\n"
        "f = gcmc.run_point\n"
        "import gcmc.api\n"
        "print(before, f is gcmc.api.run_point)\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=REPO
    )
    assert out.stdout.split() == ["False", "True"]
    with pytest.raises(AttributeError):
        _ = gcmc.no_such_name


def test_run_point_meets_the_exact_henry_limit(capsys: pytest.CaptureFixture[str]) -> None:
    """At a fugacity low enough that the pore holds ~0.1 molecule, the density is K_H f, with
    K_H the exact quadrature of the wall Boltzmann factor (gcmc.physics.henry, Steele 1973
    walls); pair interactions change it by less than 1 % at that loading (second virial
    order), well inside the 3 standard errors the test allows."""
    f = 100.0
    run = api.run_point(
        "methane", 298.15, fugacity_Pa=f, width_H_nm=0.8, eos="ideal", moves=400_000, seed=11
    )
    assert capsys.readouterr() == ("", "")  # prints nothing
    kh = pore_limit(run.model, 298.15).henry_per_nm3_per_pa
    expected = kh * f
    assert run.pressure_Pa == f and run.fugacity_Pa == f  # the ideal gas: p = f exactly
    assert run.density_per_nm3_stderr > 0
    z = (run.density_per_nm3 - expected) / run.density_per_nm3_stderr
    assert abs(z) < 3.0 + 0.01 * expected / run.density_per_nm3_stderr, (
        run.density_per_nm3,
        expected,
        run.density_per_nm3_stderr,
    )


def test_run_point_matches_the_command_line_and_the_w_axis(
    capsys: pytest.CaptureFixture[str],
) -> None:
    """The API and `gcmc point --json` share one path: same arguments and seed, same numbers;
    and a width given as w = H - sigma_ss is the same pore as the H it stands for."""
    h = 1.2
    w = h - default_solid().sigma_nm
    common = dict(moves=20_000, seed=3)
    by_h = api.run_point("methane", 298.15, pressure_Pa=1e6, width_H_nm=h, **common)
    by_w = api.run_point("methane", 298.15, pressure_Pa=1e6, width_w_nm=w, **common)
    assert by_w.model.width_nm == pytest.approx(h, rel=1e-15)
    assert by_w.result.molecules_mean == pytest.approx(by_h.result.molecules_mean, rel=1e-12)
    code = main(
        [
            "point",
            "--probe",
            "methane",
            "--temperature",
            "298.15",
            "--pressure",
            "1e6",
            "--width-H",
            str(h),
            "--moves",
            "20000",
            "--seed",
            "3",
            "--json",
        ]
    )
    out, err = capsys.readouterr()
    assert code == 0, err
    record = json.loads(out)
    mine = by_h.to_dict()
    for key in ("molecules_mean", "molecules_stderr", "density_per_nm3", "fugacity_Pa", "moves"):
        assert record[key] == mine[key], key
    assert record["model"] == mine["model"]
    assert record["notes"] == [] and record["eos_requested"] == "reference"


def test_fugacity_beyond_the_eos_keeps_the_point(capsys: pytest.CaptureFixture[str]) -> None:
    """Bulk argon at 239.6 K and f = 7e8 Pa, a dense LJ state that the reference EOS cannot
    map to a pressure in its range: the point is simulated at the given fugacity and the
    quantities that need the bulk state are unavailable, with a note."""
    run = api.run_point("argon", 239.6, fugacity_Pa=7e8, bulk=True, moves=20_000, replicas=1)
    r = run.result
    assert math.isnan(r.pressure_Pa) and math.isnan(r.bulk_density_per_nm3)
    assert math.isnan(r.excess_density_per_nm3) and math.isnan(r.isosteric_heat_kJ_per_mol)
    assert r.fugacity_Pa == 7e8 and r.density_per_nm3 > 0 and r.molecules_mean > 0
    assert len(run.notes) == 1 and "fugacity" in run.notes[0] and "unavailable" in run.notes[0]
    d = run.to_dict()
    assert d["pressure_Pa"] is None and d["excess_density_per_nm3"] is None
    # the command line: exit 0, valid JSON (null for what is unavailable), the note
    args = ["point", "--probe", "argon", "--temperature", "239.6", "--fugacity", "7e8"]
    code = main([*args, "--bulk", "--moves", "20000", "--replicas", "1", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    record = json.loads(out)
    assert record["pressure_Pa"] is None and record["notes"] == run.notes
    code = main([*args, "--bulk", "--moves", "20000", "--replicas", "1"])
    out, _ = capsys.readouterr()
    assert code == 0 and "p = unavailable" in out and "note: pressure" in out


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        (dict(width_H_nm=1.0, width_w_nm=0.66), "width_H_nm"),
        (dict(), "width_H_nm"),
        (dict(width_H_nm=0.3), "width_H_nm"),
        (dict(width_H_nm=1.0, moves=100), "moves"),
        (dict(width_H_nm=1.0, pressure_Pa=None), "pressure_Pa"),
        (dict(width_H_nm=float("nan")), "width_H_nm"),
    ],
)
def test_run_point_names_the_bad_argument(kwargs: dict, field: str) -> None:
    args = dict(pressure_Pa=1e5) | kwargs
    with pytest.raises(InputError, match=field):
        api.run_point("argon", 120.0, **args)


def test_build_open_check_diff(tiny_kernel, tmp_path: Path, capsys) -> None:  # noqa: ANN001
    """A kernel through the API: built (nothing printed), up to date on a second call, opened,
    checked (criteria with verdicts, report files) and diffed against itself (no change, no
    deviation)."""
    built = tiny_kernel
    assert built.ok and built.path.is_file() and built.data is not None
    assert len(built.fits) == len(built.config.widths_H_nm)
    again = api.build_kernel(built.config.path, workers=1)
    assert again.status == "up_to_date" and again.path == built.path
    planned_cfg = tmp_path / "planned.toml"
    planned_cfg.write_text(
        built.config.path.read_text().replace('name = "tiny-methane"', 'name = "planned"')
    )
    planned = api.build_kernel(planned_cfg, plan_only=True)
    assert planned.status == "planned" and planned.data is None and planned.path is None
    assert planned.plan is not None and len(planned.plan.tasks) == 5
    assert list(tmp_path.rglob("*.h5")) == []  # planning writes no kernel
    assert capsys.readouterr() == ("", "")

    kernel = api.open_kernel(built.path)
    assert kernel.name == "tiny-methane" and kernel.widths_H_nm.size == 5
    checked = api.check_kernel(kernel, realisations=2, report_dir=tmp_path / "report")
    keys = [c.key for c in checked.criteria]
    assert keys[:3] == ["point_errors", "point_flags", "monotonic"]
    assert checked.verdict in ("pass", "warn", "fail")
    assert checked.passed == (checked.verdict != "fail")
    assert checked.criterion("henry").key == "henry"
    assert {p.name for p in checked.files} >= {"check.json"}
    on_disk = json.loads((tmp_path / "report" / "check.json").read_text())
    assert on_disk["verdict"] == checked.verdict
    assert on_disk["settings"]["target_rel_stderr"] == 0.02
    same = api.diff_kernels(built.path, kernel)
    assert same.agree and same.largest_sigma == 0.0 and same.changes == []
    assert same.grids_identical
    assert capsys.readouterr().out == ""


def test_check_kernel_names_bad_arguments(tiny_kernel) -> None:  # noqa: ANN001
    with pytest.raises(InputError, match="noise_rel"):
        api.check_kernel(tiny_kernel.path, noise_rel=-1.0)
    with pytest.raises(InputError, match="pressures_Pa"):
        api.check_kernel(tiny_kernel.path, pressures_Pa=[1e4])
    with pytest.raises(InputError, match="temperature"):
        api.check_kernel(tiny_kernel.path, temperature_K=77.0)
    with pytest.raises(InputError, match="target_rel_stderr"):
        api.check_kernel(tiny_kernel.path, target_rel_stderr=0.0)
    assert np.isfinite(tiny_kernel.wall_seconds)


def test_default_psds_where_only_the_narrow_widths_are_resolved() -> None:
    """The check's synthetic distributions stay finite when the middle of the resolved range
    falls between a resolved width and an unresolved one (dw_2 = inf there): before, the
    check stopped with an error on such kernels (seen on a 5-width methane kernel at 298 K;
    the dw_2 values below are that kernel's)."""
    from gcmc.quality.criteria import default_psds
    from gcmc.quality.resolution import NoiseModel, ResolvingPower

    w = np.array([0.36, 0.46, 0.66, 1.06, 1.66])
    pair = np.array([0.028, 0.0416, 0.0918, np.inf, np.inf])
    nan = np.full(w.size, np.nan)
    res = ResolvingPower(
        temperature_K=298.15,
        pressures_Pa=np.geomspace(1e4, 3.5e6, 5),
        widths_w_nm=w,
        widths_H_nm=w + 0.34,
        single_step_nm=nan,
        single_step_fixed_volume_nm=nan,
        pair_half_separation_nm=pair,
        kernel_noise_share=nan,
        resolved=np.isfinite(pair),
        limit_w_nm=1.06,
        limit_H_nm=1.40,
        all_resolved=False,
        none_resolved=False,
        singular_values=np.ones(3),
        n_significant=3,
        chi2_threshold=1.0,
        resolution_fraction=0.25,
        noise=NoiseModel(0.01, 0.01),
    )
    psds = default_psds(res)
    for psd in psds:
        for centre, sd, fraction in psd.modes:
            assert np.isfinite(centre) and np.isfinite(sd) and sd > 0 and fraction > 0
    assert psds[0].modes[0][1] >= 0.0918  # as broad as the widest resolved dw_2 below it
