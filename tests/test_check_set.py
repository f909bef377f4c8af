"""Checks of a set of kernels (gcmc.quality.joint, gcmc.quality.joint_report, `gcmc check K1
K2 ...`).

The kernels are synthetic, invented test data built in code (tests/set_kernels.py): Langmuir
pores (I. Langmuir, J. Am. Chem. Soc. 40 (1918) 1361) whose affinity is chosen so that the
answer is known by construction: a small probe that enters every pore but carries no width
information above ~1 nm, and a large probe that is excluded from pores below 0.7 nm (molecular
sieving) but separates the wide ones. The definitions of the resolving power and the round
trip are those of the single check (gcmc.quality.resolution, gcmc.quality.criteria); the
tests here check that the set uses them consistently (one member = the single check) and does
not count one isotherm twice.
"""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest
from set_kernels import large, large_probe, make_set_kernel, small

from gcmc.cli import app as cli
from gcmc.errors import InputError
from gcmc.kernel.reader import Kernel
from gcmc.kernel.writer import write_kernel
from gcmc.quality.criteria import SyntheticPSD, default_psds, uniform_grid
from gcmc.quality.joint import (
    Experiment,
    SetSettings,
    format_plan,
    format_set_table,
    joint_resolution,
    joint_round_trip,
    make_member,
    plan,
    run_set_checks,
    set_consistency,
    set_grid,
)
from gcmc.quality.joint_report import write_set_report
from gcmc.quality.resolution import NoiseModel, resolution_from_matrix, resolving_power

FAST = SetSettings(realisations=6, member_health=False)


@pytest.fixture(scope="module")
def pair():
    return make_member(small()), make_member(large())


# --------------------------------------------------------------------------------------------
# consistency: a set that mixes conventions is refused with a one-line reason
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("change", "reason"),
    [
        ({"width_convention": "nucleus to nucleus: w = H"}, "mixed width conventions"),
        ({"pore_volume_convention": "A * H"}, "mixed pore-volume conventions"),
        ({"solid_sigma": 0.35}, "mixed solid models"),
    ],
)
def test_mixed_conventions_are_refused(pair, change, reason) -> None:
    other = make_member(make_set_kernel(large_probe, 0.7, "large-probe", "largegas", **change))
    with pytest.raises(InputError, match=reason) as exc:
        run_set_checks([pair[0], other], FAST)
    msg = str(exc.value)
    assert "\n" not in msg and "small-probe" in msg and "large-probe" in msg


def test_width_axes_must_overlap(pair) -> None:
    far = make_member(
        make_set_kernel(large_probe, 3.0, "far", "largegas", widths=np.linspace(3.0, 4.0, 11))
    )
    with pytest.raises(InputError, match="width axes do not overlap"):
        set_consistency([pair[0], far])


def test_cli_refuses_a_mixed_set_with_one_line(tmp_path, capsys) -> None:
    a = write_kernel(small(), tmp_path)
    b = write_kernel(
        make_set_kernel(large_probe, 0.7, "large-probe", "largegas", pore_volume_convention="A*H"),
        tmp_path,
    )
    code = cli.main(["check", str(a), str(b)])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert err.count("\n") == 0 and "mixed pore-volume conventions" in err
    assert not list(tmp_path.glob("*.tmp"))


# --------------------------------------------------------------------------------------------
# stacking: one member is the single check; the same isotherm twice is counted once
# --------------------------------------------------------------------------------------------
def test_one_member_set_equals_the_single_resolving_power(pair) -> None:
    """With one member on its own grid the stacked definitions reduce to those of the single
    check (gcmc.quality.resolution), number for number."""
    rp = resolving_power(Kernel(small()), 298.15, noise=NoiseModel())
    jr = joint_resolution([pair[0]])
    np.testing.assert_allclose(jr.set.widths_w_nm, rp.widths_w_nm)
    np.testing.assert_allclose(jr.set.pair_half_separation_nm, rp.pair_half_separation_nm)
    np.testing.assert_allclose(jr.set.singular_values, rp.singular_values, rtol=1e-12)
    assert jr.set.intervals_w_nm[-1][1] == pytest.approx(rp.limit_w_nm, rel=1e-9)


def test_two_identical_kernels_resolve_nothing_more_than_one(pair) -> None:
    """A second copy of the same kernel (renamed, another object) with the same experiment is
    the same isotherm: stacking it would shrink dw_2 by 2^(1/4) (shown below on the raw
    stacked matrices) and claim resolution that no measurement gave."""
    one = joint_resolution([pair[0]])
    copy = make_member(dataclasses.replace(small(), name="small-probe-copy"))
    two = joint_resolution([pair[0], copy])
    np.testing.assert_array_equal(two.set.pair_half_separation_nm, one.set.pair_half_separation_nm)
    np.testing.assert_array_equal(two.set.singular_values, one.set.singular_values)
    assert two.set.intervals_w_nm == one.set.intervals_w_nm
    assert two.duplicates == [("small-probe-copy", "small-probe")]
    # what double counting would have claimed: the same rows stacked twice
    k = np.abs(np.random.default_rng(3).normal(size=(12, 5))) + 1.0
    d1, d2 = np.gradient(k, axis=1), np.gradient(np.gradient(k, axis=1), axis=1) + 0.1 * k**2
    s = 0.01 * k
    single = resolution_from_matrix(k, d1, d2, s)["pair"]
    doubled = resolution_from_matrix(*(np.vstack([x, x]) for x in (k, d1, d2, s)))["pair"]
    np.testing.assert_allclose(doubled, single / 2**0.25, rtol=1e-10)


def test_the_same_kernel_with_another_experiment_adds_evidence(pair) -> None:
    """Not every repeat is a duplicate: the same kernel measured again on other pressures is a
    second measurement, and the set resolves at least as finely as either alone."""
    other = make_member(
        small(), experiment=Experiment(np.geomspace(3e2, 5e5, 15), NoiseModel(0.01, 0.01))
    )
    jr = joint_resolution([pair[0], other])
    assert jr.duplicates == []
    best = jr.best_member_pair_nm
    assert np.all(jr.set.pair_half_separation_nm <= best * (1 + 1e-12))
    assert np.any(jr.set.pair_half_separation_nm < 0.97 * best)


def test_set_resolves_more_than_either_member(pair) -> None:
    jr = joint_resolution(list(pair))
    s, a, b = jr.set, *jr.members
    # by construction: the small probe has no width information above ~1 nm, the large one
    # sees no pore below 0.7 nm
    assert a.intervals_w_nm[0][0] == pytest.approx(0.3) and a.intervals_w_nm[-1][1] < 1.2
    assert b.intervals_w_nm[0][0] == pytest.approx(0.7)
    assert np.all(np.isinf(b.pair_half_separation_nm[s.widths_w_nm < 0.7 - 1e-9]))
    assert s.resolved_span_nm > max(a.resolved_span_nm, b.resolved_span_nm) + 0.1
    # stacking never loses: dw_2 of the set <= the best member at every width
    assert np.all(s.pair_half_separation_nm <= jr.best_member_pair_nm * (1 + 1e-9))


# --------------------------------------------------------------------------------------------
# joint round trip
# --------------------------------------------------------------------------------------------
def test_joint_round_trip_recovers_what_neither_member_recovers(pair) -> None:
    """Two modes, one at 0.55 nm (mostly inside pores the large probe cannot enter) and one at
    2.0 nm (where the small probe carries no width information): known by construction to need
    both probes."""
    jr = joint_resolution(list(pair))
    psd = SyntheticPSD("narrow and wide", ((0.55, 0.1, 0.5), (2.0, 0.12, 0.5)))
    rt = joint_round_trip(list(pair), jr, psd, realisations=8, seed=11)
    assert rt.resolvable, rt.why
    assert rt.verdict == "pass", rt.joint.failures
    small_alone, large_alone = rt.members
    assert small_alone.verdict == "not recovered" and large_alone.verdict == "not recovered"
    # the reasons are the physical ones: the small probe places the wide mode wrongly or not
    # at all, the large probe cannot weigh the narrow mode (volume wrong or mode missed)
    assert any("2" in f and "mode at 2" in f for f in small_alone.failures)
    assert any("volume" in f or "mode at 0.55" in f for f in large_alone.failures)
    mv, _ = rt.joint.volume_rel_error(rt.volume_true)
    assert abs(mv) < 0.05


def test_full_set_check_and_table(pair) -> None:
    rep = run_set_checks(list(pair), SetSettings(realisations=6))
    keys = [c.key for c in rep.criteria]
    assert keys == [
        "set_consistency",
        "set_accessibility",
        "set_resolving_power",
        "set_round_trip",
        "member_health",
    ]
    assert rep.verdict == "pass" and rep.exit_code == 0
    acc = rep.criterion("set_accessibility").data["members"]
    assert [r["smallest_accessible_w_nm"] for r in acc] == pytest.approx([0.3, 0.7])
    text = format_set_table(rep)
    assert "verdict: PASS" in text and "threshold:" in text
    json.dumps(rep.to_dict())  # JSON-able


def test_set_report_writes_the_gain_figure(pair, tmp_path) -> None:
    rep = run_set_checks(list(pair), FAST)
    files = write_set_report(rep, tmp_path / "rep")
    names = {p.name for p in files}
    assert {"set-gain.png", "set-gain.pdf", "set-round-trip.png", "set-check.json"} <= names
    assert all(p.stat().st_size > 0 for p in files)
    assert not list((tmp_path / "rep").glob(".*tmp"))


# --------------------------------------------------------------------------------------------
# planning
# --------------------------------------------------------------------------------------------
def test_plan_ranks_the_kernel_that_adds_resolution_first(pair) -> None:
    copy = make_member(dataclasses.replace(small(), name="small-probe-copy"))
    p = plan([0.5, 1.5, 2.0], [copy, pair[1]], base=[pair[0]])
    assert [r.member for r in p.rows] == ["large-probe", "small-probe-copy"]
    top, last = p.rows
    assert top.targets_resolved_before == 1 and top.targets_resolved_after == 3
    assert top.gain > 10.0
    # the copy is the same isotherm: it adds nothing
    assert last.targets_resolved_after == last.targets_resolved_before
    assert last.gain == pytest.approx(1.0)
    assert "rank" in format_plan(p)


def test_plan_without_base_is_greedy(pair) -> None:
    p = plan([0.5, 0.8], list(pair))
    assert p.rows[0].member == "small-probe"  # resolves both targets alone
    assert p.rows[0].targets_resolved_after == 2


# --------------------------------------------------------------------------------------------
# grids: one width or equal widths give a one-line error, not an infinite step
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("widths", [[1.0], [1.0, 1.0, 1.0], [np.nan, 1.0]])
def test_inversion_grid_needs_two_distinct_widths(widths) -> None:
    with pytest.raises(InputError, match="at least 2 distinct widths"):
        uniform_grid(np.array(widths))


def test_set_grid_merges_equal_widths_and_default_psds_are_finite(pair) -> None:
    # the same axis twice and a copy shifted by less than the merge tolerance
    shifted = make_member(
        make_set_kernel(
            large_probe, 0.7, "shifted", "largegas", widths=np.linspace(0.25, 2.5, 46) + 1e-8
        )
    )
    g = set_grid([pair[0], pair[1], shifted])
    assert np.all(np.diff(g) > 1e-6)
    r = resolving_power(Kernel(small()), 298.15)
    for psd in default_psds(r):
        for c, s, _a in psd.modes:
            assert math.isfinite(c) and math.isfinite(s) and s > 0


# --------------------------------------------------------------------------------------------
# the command line
# --------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("set")
    return write_kernel(small(), d), write_kernel(large(), d), d


def test_cli_set_json_and_experiments(files, capsys) -> None:
    a, b, d = files
    (d / "ch.txt").write_text("# invented rig\n200, 1000, 5000\n2e4 1e5 5e5\n")
    exp = d / "exp.toml"
    exp.write_text(
        f'["{a.name}"]\npressures_file = "ch.txt"\nnoise_rel = 0.02\n'
        '["large-probe"]\np_range = [1e3, 1e6]\np_points = 12\n'
    )
    code = cli.main(
        [
            "check",
            str(a),
            str(b),
            "--experiments",
            str(exp),
            "--json",
            "--realisations",
            "4",
            "--skip-member-checks",
        ]
    )
    out = json.loads(capsys.readouterr().out)
    assert code == 0 and out["verdict"] == "pass"
    m = {x["label"]: x for x in out["members"]}
    assert len(m[a.name]["pressures_Pa"]) == 6 and m[a.name]["noise"]["relative"] == 0.02
    assert len(m[b.name]["pressures_Pa"]) == 12
    assert [c["key"] for c in out["criteria"]][:2] == ["set_consistency", "set_accessibility"]


@pytest.mark.parametrize(
    ("text", "words"),
    [
        ('["small-probe"]\nnoise_relative = 0.1\n', "unknown key 'noise_relative'"),
        ('["nothing-here"]\nnoise_rel = 0.1\n', "names none of the kernels"),
        ('["small-probe"]\npressures_Pa = [1e3]\n', "at least 2 numbers"),
        ("[small-probe.v1]\nnoise_rel = 0.1\n", "quote member names"),
        ('["small-probe"]\npressures_Pa = [1e3, 1e9]\n', "above the kernel's highest"),
    ],
)
def test_cli_bad_experiments_file(files, tmp_path, capsys, text, words) -> None:
    a, b, _ = files
    exp = tmp_path / "bad.toml"
    exp.write_text(text)
    code = cli.main(["check", str(a), str(b), "--experiments", str(exp)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and err.count("\n") == 0 and words in err, err


def test_cli_plan_table(files, capsys) -> None:
    a, b, _ = files
    code = cli.main(["check", str(a), "--plan-widths", "0.5", "1.5", "--candidates", str(b)])
    out = capsys.readouterr().out
    assert code == 0
    assert "rank" in out and b.name in out.splitlines()[-1]


def test_cli_one_kernel_keeps_the_single_check(files, capsys) -> None:
    a, _, _ = files
    code = cli.main(["check", str(a), "--realisations", "3"])
    out = capsys.readouterr().out
    assert out.startswith(f"gcmc check: {a} (small-probe v1)")
    assert code in (0, 1) and "round trip synthetic PSD" in out


def test_cli_set_exit_code_on_fail(files, capsys) -> None:
    """A failing member check fails the set (exit 1): a member with a damaged point."""
    a, b, d = files
    bad = small()
    bad.points["adsorption"]["density_per_nm3"][0, 20, 10] *= 1.3
    bad = dataclasses.replace(bad, name="small-probe-damaged")
    c = write_kernel(bad, d)
    code = cli.main(["check", str(c), str(b), "--realisations", "3"])
    out = capsys.readouterr().out
    assert code == 1 and "verdict: FAIL" in out
