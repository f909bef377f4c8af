"""User-facing names: one name per quantity, old names kept as deprecated aliases, help texts
that state a default once, exports that print numbers as a person reads them, and the kernel
matrix export."""

from __future__ import annotations

import argparse
import csv
import dataclasses
import io
import json
import re
import warnings
from pathlib import Path

import numpy as np
import pytest

from gcmc.cli import main
from gcmc.cli.app import build_parser
from gcmc.cli.kernel import _num, matrix_table
from gcmc.errors import InputError
from gcmc.kernel.reader import Kernel, open_kernel
from gcmc.pipeline import config as config_module
from gcmc.pipeline.config import KNOWN_SECTIONS, load_config

REPO = Path(__file__).resolve().parents[1]


def _subparsers() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


# --------------------------------------------------------------------------------------------
# help texts and option names
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("command", ["point", "build", "show", "export", "check", "diff"])
def test_help_states_each_default_once(command: str) -> None:
    text = _subparsers()[command].format_help()
    # one option's help: from its flags to the next option's flags
    blocks = re.split(r"\n  (?=-)", text)
    for block in blocks:
        assert block.count("default") <= 1, block


def test_deprecated_option_names_are_hidden_and_still_work(
    tiny_kernel,  # noqa: ANN001
    capsys: pytest.CaptureFixture[str],
) -> None:
    sub = _subparsers()
    check_help = sub["check"].format_help()
    assert "--target-rel-stderr" in check_help and "--target-rel-error" not in check_help
    point_help = sub["point"].format_help()
    assert "--probe-library" in point_help and "--probe-file" not in point_help
    assert "--width-H" in point_help and "--width-w" in point_help
    args = sub["check"].parse_args([str(tiny_kernel.path), "--target-rel-error", "0.05"])
    assert args.target_rel_stderr == 0.05
    assert "--target-rel-error is deprecated; use --target-rel-stderr" in capsys.readouterr().err
    assert "--plan-only" in sub["build"].format_help()
    assert "--check-only" not in sub["build"].format_help()
    assert sub["build"].parse_args(["c.toml", "--check-only"]).plan_only is True
    assert "--check-only is deprecated; use --plan-only" in capsys.readouterr().err
    args = sub["point"].parse_args(["--temperature", "300", "--probe-file", "x.toml"])
    assert args.probe_library == "x.toml"
    assert "--probe-file is deprecated; use --probe-library" in capsys.readouterr().err


def test_probe_library_option_reads_a_users_file(tmp_path: Path, capsys) -> None:  # noqa: ANN001
    """--probe-library (the run config's [probe] library) loads a probe file of one's own;
    a missing file is one line naming it."""
    lib = tmp_path / "mine.toml"
    lib.write_text("[testgas]\nepsilon_k = 150.0\nsigma_nm = 0.37\n")
    base = ["point", "--probe", "testgas", "--temperature", "300", "--fugacity", "1e4"]
    code = main([*base, "--probe-library", str(lib), "--bulk", "--moves", "10000", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    record = json.loads(out)
    assert record["model"]["probe"] == "testgas" and record["model"]["epsilon_k"] == 150.0
    code = main([*base, "--probe-library", str(tmp_path / "none.toml"), "--bulk"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "none.toml" in err and "\n" not in err


def test_point_width_options_name_the_axis(capsys: pytest.CaptureFixture[str]) -> None:
    base = ["point", "--probe", "argon", "--temperature", "87.3", "--pressure", "10"]
    code = main([*base, "--width-H", "1.0", "--width-w", "0.66"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "--width-H" in err and "--width-w" in err and "\n" not in err
    code = main([*base, "--width-w", "-0.2"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and err.startswith("gcmc point: error: --width-w")


# --------------------------------------------------------------------------------------------
# run config keys
# --------------------------------------------------------------------------------------------
def _config(tmp_path: Path, sampling: str) -> Path:
    text = (REPO / "tests" / "configs" / "tiny.toml").read_text()
    path = tmp_path / "c.toml"
    path.write_text(text + sampling)
    return path


def test_replica_exchange_key_and_its_old_name(tmp_path: Path) -> None:
    new = load_config(_config(tmp_path, "replica_exchange = true\n"))
    assert new.sampling.replica_exchange is True
    with pytest.warns(FutureWarning, match="exchange: deprecated key; write replica_exchange"):
        old = load_config(_config(tmp_path, "exchange = true\n"))
    assert old.sampling.replica_exchange is True and old.config_hash == new.config_hash
    with pytest.raises(InputError, match="replica_exchange only"):
        load_config(_config(tmp_path, "exchange = true\nreplica_exchange = true\n"))


def test_config_hash_survives_the_rename() -> None:
    """The hash names the kernel's task folder and decides whether a kernel is up to date: the
    rename of a sampling key must not change it. The value was computed by the code before the
    rename (a regression pin, not physics)."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        cfg = load_config(REPO / "tests" / "configs" / "tiny.toml")
    assert cfg.config_hash == "e2eefeaf2ab4fd647126317cee25ca0c016ddc5833b1d7439005ed5d77cdd516"


def test_configs_readme_documents_every_table_and_key(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every table of a run config and every key the parser asks for appears in
    configs/README.md (keys are recorded while the example configs are parsed)."""
    readme = (REPO / "configs" / "README.md").read_text()
    asked: set[str] = set()
    original = config_module._Fields._get

    def spy(self, key: str, required: bool):  # noqa: ANN001, ANN202
        asked.add(key)
        return original(self, key, required)

    monkeypatch.setattr(config_module._Fields, "_get", spy)
    for name in ("quickstart.toml", "argon-87K-production.toml"):
        load_config(REPO / "configs" / name)
    load_config(REPO / "tests" / "configs" / "tiny.toml")
    assert len(asked) > 20
    for key in sorted(asked | KNOWN_SECTIONS):
        assert f"`{key}`" in readme or f"`[{key}]`" in readme, key
    for key in ("library_name", "library", "from_p_p0", "to_p_p0", "p_p0", "w_nm", "axis"):
        assert f"`{key}`" in readme, key


# --------------------------------------------------------------------------------------------
# the show summary, exports
# --------------------------------------------------------------------------------------------
def test_show_counts_the_unconverged_points(tiny_kernel, capsys) -> None:  # noqa: ANN001
    """`gcmc show` reports as many not-converged points as the file's converged field holds
    zeros among the simulated points (it read a misspelt field and always said 0)."""
    k = open_kernel(tiny_kernel.path)
    pts = k.data.points["adsorption"]
    sim = np.isfinite(pts["density_per_nm3"])
    expected = int(np.count_nonzero(~np.asarray(pts["converged"], bool) & sim))
    assert main(["show", str(tiny_kernel.path)]) == 0
    out = capsys.readouterr().out
    line = next(x for x in out.splitlines() if "adsorption:" in x)
    assert line.rstrip().endswith(f"{expected} unconverged"), line
    assert "wall-clock" in out


def test_numbers_read_as_a_person_reads_them() -> None:
    assert _num(0.35999999999999993) == "0.36"
    assert _num(1.0e-7) == "1e-07" and _num(123456.0) == "123456"
    assert _num(float("nan")) == "nan" and _num(-float("inf")) == "-inf"
    assert float(_num(np.pi)) == pytest.approx(np.pi, rel=5e-12)


def test_matrix_export_csv_and_npz(tiny_kernel, tmp_path: Path) -> None:  # noqa: ANN001
    """--matrix: one row per pressure, one column per width, units in the header; the values
    are the reader's kernel matrix at those pressures and widths (12 significant digits)."""
    k = open_kernel(tiny_kernel.path)
    pfile = tmp_path / "p.txt"
    pfile.write_text("# my rig's pressures, Pa\n2e4, 5e4\n1e5 3e5\n")
    wfile = tmp_path / "w.txt"
    wfile.write_text("0.4 0.5 0.9\n")
    out = tmp_path / "m.csv"
    args = ["export", str(tiny_kernel.path), "--matrix", "--pressures-Pa", str(pfile)]
    assert main([*args, "--widths-w", str(wfile), "--format", "csv", "--output", str(out)]) == 0
    rows = list(csv.reader(io.StringIO(out.read_text())))
    assert rows[0][:2] == ["pressure_Pa", "relative_pressure"]
    assert rows[0][2:] == [f"density_per_nm3 at w = {x} nm" for x in ("0.4", "0.5", "0.9")]
    assert len(rows) == 5 and all(len(r) == 5 for r in rows)
    expected = k.evaluate([2e4, 5e4, 1e5, 3e5], [0.4, 0.5, 0.9], 298.15)
    got = np.array([[float(x) for x in r[2:]] for r in rows[1:]])
    np.testing.assert_allclose(got, expected, rtol=5e-12)
    assert [float(r[0]) for r in rows[1:]] == [2e4, 5e4, 1e5, 3e5]
    npz = tmp_path / "m.npz"
    assert (
        main([*args, "--widths-H", str(wfile), "--excess", "--format", "npz", "--output", str(npz)])
        == 2
    )
    wfile.write_text("0.8 1.2\n")
    assert (
        main([*args, "--widths-H", str(wfile), "--excess", "--format", "npz", "--output", str(npz)])
        == 0
    )
    with np.load(npz, allow_pickle=False) as z:
        m = z["excess_density_per_nm3"]
        assert m.shape == (4, 2)
        np.testing.assert_array_equal(
            m, k.evaluate([2e4, 5e4, 1e5, 3e5], [0.8, 1.2], 298.15, "H", "excess")
        )
        np.testing.assert_allclose(z["width_H_nm"], [0.8, 1.2])
        np.testing.assert_allclose(z["width_w_nm"], np.array([0.8, 1.2]) - 0.34)
        assert "columns: widths" in json.loads(str(z["units_json"]))["excess_density_per_nm3"]


def test_matrix_export_relative_pressures(tiny_kernel) -> None:  # noqa: ANN001
    """p/p0 through the kernel's saturation pressure; a kernel without one (supercritical
    methane at 298 K) refuses p/p0 with one line."""
    k = open_kernel(tiny_kernel.path)
    with pytest.raises(InputError, match="no saturation pressure"):
        matrix_table(k, relative_pressures=np.array([0.1, 0.5]))
    p0 = 2.0e6  # invented: a saturation pressure put into a copy of the kernel
    data = dataclasses.replace(k.data, saturation_pressures_Pa=np.array([p0]))
    table = matrix_table(Kernel(data), relative_pressures=np.array([0.01, 0.1, 0.5]))
    np.testing.assert_allclose(table.pressure_Pa, [0.01 * p0, 0.1 * p0, 0.5 * p0])
    np.testing.assert_allclose(table.relative_pressure, [0.01, 0.1, 0.5])
    np.testing.assert_array_equal(
        table.matrix, k.evaluate(table.pressure_Pa, k.widths_w_nm, 298.15)
    )


def test_matrix_export_of_the_heat_kernel(tiny_kernel, tmp_path: Path, capsys) -> None:  # noqa: ANN001
    """--matrix --heat writes the reader's isosteric-heat kernel and its errors on the given
    axes (csv: values, then errors; npz: two matrices); `gcmc show` names the heat kernel."""
    k = open_kernel(tiny_kernel.path)
    assert k.data.heat is not None
    p = [2e4, 1e5, 3e5]
    w = list(k.widths_w_nm[:2])
    q, e = k.isosteric_heat(p, w, 298.15)
    out = tmp_path / "q.csv"
    base = ["export", str(tiny_kernel.path), "--matrix", "--heat", "--p-range", "2e4", "3e5"]
    pfile = tmp_path / "p.txt"
    pfile.write_text(" ".join(str(x) for x in p))
    args = ["export", str(tiny_kernel.path), "--matrix", "--heat", "--pressures-Pa", str(pfile)]
    assert main([*args, "--format", "csv", "--output", str(out)]) == 0
    rows = list(csv.reader(io.StringIO(out.read_text())))
    n_w = k.widths_w_nm.size
    assert rows[0][2].startswith("isosteric_heat_kJ_per_mol at w = ")
    assert rows[0][2 + n_w].startswith("isosteric_heat_kJ_per_mol_stderr at w = ")
    got = np.array([[float(x) for x in r[2:]] for r in rows[1:]])
    np.testing.assert_allclose(got[:, :2], q, rtol=5e-12)
    np.testing.assert_allclose(got[:, n_w : n_w + 2], e, rtol=5e-12)
    npz = tmp_path / "q.npz"
    assert main([*base, "--format", "npz", "--output", str(npz)]) == 0
    with np.load(npz, allow_pickle=False) as z:
        assert z["isosteric_heat_kJ_per_mol"].shape == z["isosteric_heat_kJ_per_mol_stderr"].shape
        assert json.loads(str(z["units_json"]))["isosteric_heat_kJ_per_mol"].startswith("kJ/mol")
    with pytest.raises(SystemExit) as exc:  # argparse: --excess and --heat exclude each other
        main([*base, "--excess", "--format", "npz", "--output", str(tmp_path / "x.npz")])
    assert exc.value.code == 2 and not (tmp_path / "x.npz").exists()
    capsys.readouterr()
    assert main(["show", str(tiny_kernel.path)]) == 0
    assert "isosteric-heat kernel at" in capsys.readouterr().out


def test_matrix_options_need_matrix(tiny_kernel, tmp_path: Path, capsys) -> None:  # noqa: ANN001
    out = tmp_path / "x.csv"
    code = main(
        ["export", str(tiny_kernel.path), "--format", "csv", "--output", str(out), "--excess"]
    )
    err = capsys.readouterr().err.strip()
    assert code == 2 and "--excess: applies to --matrix only" in err and not out.exists()


# --------------------------------------------------------------------------------------------
# documentation inside the package
# --------------------------------------------------------------------------------------------
def test_code_cites_no_file_outside_the_repository() -> None:
    """Docstrings and comments cite papers or files of this repository, not documents that
    only exist beside it."""
    outside = re.compile(r"\.\./shared|CONVENTIONS\.md|REFERENCES\.md")
    hits = [
        f"{p.relative_to(REPO)}:{i}"
        for folder in ("gcmc", "tests", "scripts", "benchmarks")
        for p in sorted((REPO / folder).rglob("*.py"))
        for i, line in enumerate(p.read_text().splitlines(), 1)
        if outside.search(line) and p.name != "test_labels.py"
    ]
    assert hits == []


def test_check_help_documents_info_and_quadrature() -> None:
    text = " ".join(_subparsers()["check"].format_help().split())
    assert "info where it only reports numbers" in text
    assert "sqrt((R n)^2 + A^2)" in text


def test_target_rel_stderr_key_and_its_old_name(tmp_path: Path) -> None:
    """[target] names the point-error target as gcmc check and [sampling] do
    (target_rel_stderr); the old key is read with a warning and keeps the config's hash (a
    kernel built before stays up to date), both keys at once are refused, and a kernel whose
    stored target has the old key still gives its target back."""
    from gcmc.quality.target import QualityTarget

    def cfg(key: str) -> Path:
        text = (REPO / "tests" / "configs" / "refine.toml").read_text()
        assert "target_rel_stderr = 0.05" in text
        path = tmp_path / "r.toml"
        path.write_text(text.replace("target_rel_stderr = 0.05", key))
        return path

    new = load_config(cfg("target_rel_stderr = 0.05"))
    assert new.target is not None and new.target.target_rel_stderr == 0.05
    with pytest.warns(FutureWarning, match="target_rel_error: deprecated key"):
        old = load_config(cfg("target_rel_error = 0.05"))
    assert old.target == new.target and old.config_hash == new.config_hash
    with pytest.raises(InputError, match="target_rel_stderr only"):
        load_config(cfg("target_rel_error = 0.05\ntarget_rel_stderr = 0.05"))
    stored = new.target.to_dict()
    stored["target_rel_error"] = stored.pop("target_rel_stderr")
    assert QualityTarget.from_dict(stored) == new.target


def test_quality_target_aims_the_sampler_at_its_point_error_rule(tmp_path: Path) -> None:
    """[sampling] target_rel_stderr = "target" sets the sampler's precision target to the
    [target]'s point-error rule (relative error, with the experiment's absolute noise as the
    floor; no target_not_reached flag: the check judges such points). Without it nothing
    changes (the config's hash neither), and "target" without a [target] is refused."""
    from gcmc.physics.units import MMOL_PER_CM3_PER_NM3

    text = (REPO / "tests" / "configs" / "refine.toml").read_text()
    plain = load_config(REPO / "tests" / "configs" / "refine.toml")
    assert plain.sampling.target_rel_stderr == 0 and plain.sampling.target_flags is True
    path = tmp_path / "r.toml"
    aim = 'sample_every = 20\ntarget_rel_stderr = "target"\n'
    path.write_text(text.replace("sample_every = 20\n", aim))
    cfg = load_config(path)
    t = cfg.target
    assert t is not None
    assert cfg.sampling.target_rel_stderr == t.target_rel_stderr
    assert cfg.sampling.stderr_floor_per_nm3 == pytest.approx(
        t.noise_abs_mmol_cm3 / MMOL_PER_CM3_PER_NM3
    )
    assert cfg.sampling.target_flags is False and cfg.task_hash != plain.task_hash
    path.write_text(text.replace("sample_every = 20\n", aim).split("[target]")[0])
    with pytest.raises(InputError, match='target_rel_stderr: "target" needs a \\[target\\]'):
        load_config(path)
