"""The quickstart kernel end to end (the README's main command), and what a simulated kernel
must show: fits near reduced chi-square 1 at default settings, and a Henry-law extension below
the lowest simulated pressure that agrees with the simulated low-pressure points.

The default suite builds a cut-down first grid of the quickstart (every other width, its
``[target]`` with ``refine = false``: the refinement rounds cost minutes); the slow test
builds it as shipped, refining itself, and runs ``gcmc check`` on the result."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


def quickstart_text(out: Path, refine: bool) -> str:
    """configs/quickstart.toml with its output in ``out`` (and refinement off unless asked)."""
    text = (ROOT / "configs" / "quickstart.toml").read_text()
    text = text.replace('output = "../runs/quickstart"', f'output = "{out}"')
    assert str(out) in text, "the quickstart's output line changed; update this test"
    if not refine:
        assert "\n[target]\n" in text
        text = text.replace("\n[target]\n", "\n[target]\nrefine = false\n", 1)
        # a cut-down first grid (every other width: the default suite's cost)
        for old, new in (
            ("step_nm = 0.025 }", "step_nm = 0.05 }"),
            ("step_nm = 0.125 }", "step_nm = 0.25 }"),
        ):
            assert old in text, "the quickstart's width grid changed; update this test"
            text = text.replace(old, new)
    return text


@pytest.fixture(scope="module")
def quickstart_kernel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Build configs/quickstart.toml's first grid (output folder in tmp, refinement off)."""
    tmp = tmp_path_factory.mktemp("quickstart")
    text = quickstart_text(tmp / "out", refine=False)
    cfg = tmp / "quickstart.toml"
    cfg.write_text(text)
    env = dict(os.environ)
    proc = subprocess.run(
        [sys.executable, "-m", "gcmc.cli", "build", str(cfg), "--no-progress"],
        capture_output=True,
        text=True,
        env=env,
        timeout=1500,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "worst fit" in proc.stdout  # the summary table
    files = sorted((tmp / "out").glob("*.v1.h5"))
    assert len(files) == 1
    # a rerun of the same config is a no-op and does not make a new version
    again = subprocess.run(
        [sys.executable, "-m", "gcmc.cli", "build", str(cfg), "--no-progress"],
        capture_output=True,
        text=True,
        env=env,
        timeout=600,
    )
    assert again.returncode == 0 and "up to date" in again.stdout
    assert sorted((tmp / "out").glob("*.h5")) == files
    return files[0]


def test_quickstart_kernel_reads_and_evaluates(quickstart_kernel: Path) -> None:
    from gcmc.kernel.reader import open_kernel

    k = open_kernel(quickstart_kernel)
    d = k.data
    assert d.probe["name"] == "methane"
    p = np.geomspace(1e2, 3e6, 50)
    m = k.evaluate(p, d.widths_w_nm, temperature_K=298.15)
    assert m.shape == (50, len(d.widths_w_nm))
    assert np.all(np.isfinite(m)) and np.all(m >= 0)
    # loading grows with pressure at every width (an exact property: dN/dmu = var N / kT >= 0)
    assert np.all(np.diff(m, axis=0) >= -1e-9)


def test_fits_near_unit_reduced_chi2(quickstart_kernel: Path) -> None:
    """At default settings the chosen forms describe the simulated isotherms to within their
    errors: the reduced chi-square scatters around 1 (for 10 points and 2-4 parameters its
    standard deviation is about sqrt(2/dof) ~ 0.5; we allow a median within [0.3, 3]).

    An isotherm that no form describes is stored as the monotone interpolant, whose own
    chi-square has no degrees of freedom left (NaN); it counts here with the best reduced
    chi-square any form reached on it, so a failing form raises the median instead of
    leaving it undefined."""
    from gcmc.kernel.reader import open_kernel
    from gcmc.pipeline.fits import fit_isotherm

    d = open_kernel(quickstart_kernel).data
    pts = d.points["adsorption"]
    chi, accepted = [], []
    for t, row in enumerate(d.fits):
        for w, f in enumerate(row):
            if f.form == "zero":
                continue
            accepted.append(f.accepted)
            if f.accepted:
                chi.append(f.reduced_chi2)
                continue
            # the candidates the build tried on this isotherm (the quickstart's default forms)
            res = fit_isotherm(
                d.pressures_Pa[t],
                pts["density_per_nm3"][t, w],
                pts["density_per_nm3_stderr"][t, w],
            )
            tried = [c[1] for c in res.candidates if np.isfinite(c[1])]
            assert tried, (d.widths_H_nm[w], res.candidates)
            chi.append(min(tried))
    assert chi, "no fitted isotherm"
    assert np.all(np.isfinite(chi)), chi
    assert 0.3 <= float(np.median(chi)) <= 3.0, chi
    assert sum(accepted) >= 0.6 * len(accepted), chi


def test_henry_extension_agrees_with_low_pressure_points(quickstart_kernel: Path) -> None:
    """Below the lowest simulated pressure the kernel follows K_H f with the exact Henry
    constant (quadrature of the wall Boltzmann factor: an exact limit). At the two lowest
    simulated pressures the simulated density must agree with K_H f within 3 standard errors
    plus the first-order non-ideality of the adsorbed phase, which we bound from the
    simulation itself: the change of n/f between the two lowest points."""
    from gcmc.kernel.reader import open_kernel

    k = open_kernel(quickstart_kernel)
    d = k.data
    pts = d.points["adsorption"]
    for w in range(len(d.widths_H_nm)):
        kh = d.henry_per_nm3_per_pa[0, w]
        f = d.fugacities_Pa[0]
        n = pts["density_per_nm3"][0, w]
        e = pts["density_per_nm3_stderr"][0, w]
        ratio = n[:2] / (kh * f[:2])
        slope = abs(ratio[1] - ratio[0]) / (f[1] - f[0])  # d(n / K_H f)/df
        nonideal = slope * f[0]
        assert abs(ratio[0] - 1.0) <= 3 * e[0] / (kh * f[0]) + nonideal + 0.01, (
            d.widths_H_nm[w],
            ratio,
            e[:2] / (kh * f[:2]),
        )
        # and the kernel's own extension: continuous at p_low, exactly K_H p as p -> 0
        p_low = d.pressures_Pa[0, 0]
        tiny = np.array([p_low * 1e-4])
        val = k.evaluate(tiny, d.widths_w_nm[w : w + 1], temperature_K=298.15)[0, 0]
        assert val == pytest.approx(kh * tiny[0], rel=2e-3)


def test_show_and_export(quickstart_kernel: Path, tmp_path: Path) -> None:
    from gcmc.cli import main

    assert main(["show", str(quickstart_kernel)]) == 0
    out = tmp_path / "k.csv"
    assert main(["export", str(quickstart_kernel), "--format", "csv", "--output", str(out)]) == 0
    assert out.exists() and out.stat().st_size > 0
    shutil.rmtree(tmp_path, ignore_errors=True)


@pytest.mark.slow
def test_refined_quickstart_passes_its_own_check(tmp_path: Path) -> None:
    """The README's first command, then `gcmc check` on its kernel: verdict pass, exit 0,
    against the target stored in the kernel. About 7 CPU-minutes (benchmarks/README.md,
    "Refinement"); the budget is CPU time, so a much slower machine may stop early."""
    cfg = tmp_path / "quickstart.toml"
    cfg.write_text(quickstart_text(tmp_path / "out", refine=True))
    build = subprocess.run(
        [sys.executable, "-m", "gcmc.cli", "build", str(cfg), "--no-progress"],
        capture_output=True,
        text=True,
        timeout=3600,
    )
    assert build.returncode == 0, build.stderr[-3000:]
    assert "refinement" in build.stdout
    (kernel,) = sorted((tmp_path / "out").glob("*.v1.h5"))
    check = subprocess.run(
        [sys.executable, "-m", "gcmc.cli", "check", str(kernel)],
        capture_output=True,
        text=True,
        timeout=1200,
    )
    assert "target (stored in the kernel" in check.stdout
    assert check.returncode == 0, check.stdout[-4000:]
    assert "verdict: PASS (0 fail, 0 warn)" in check.stdout, check.stdout[-4000:]
