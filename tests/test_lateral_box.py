"""The lateral box that a close-packed layer fits (gcmc.physics.potentials.lateral_box_nm)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from gcmc.errors import InputError
from gcmc.physics.model import SLIT, PoreModel, default_solid, get_probe
from gcmc.physics.potentials import (
    CLOSE_PACKED_SPACING_SIGMA,
    lateral_box_nm,
    lj,
    triangular_lattice_spacing_sigma,
    with_lateral_box,
)


def test_spacing_minimises_the_triangular_lattice_energy():
    """Independent check by direct lattice summation (exact for the model): the energy per
    molecule of a triangular LJ layer, summed over neighbours within 40 spacings, is minimal at
    the spacing the lattice sums give; 2^(1/6) = 1.1225 (the pair minimum) is not it."""
    a = triangular_lattice_spacing_sigma()
    assert a == pytest.approx(1.11145, abs=5e-5)
    assert CLOSE_PACKED_SPACING_SIGMA == pytest.approx(a, abs=5e-5)
    i = np.arange(-40, 41, dtype=float)
    ii, jj = np.meshgrid(i, i, indexing="ij")
    r = np.sqrt(ii * ii + ii * jj + jj * jj)
    r = r[(r > 0) & (r <= 40)]

    def energy(spacing: float) -> float:
        return 0.5 * float(np.sum(lj(r * spacing, 1.0, 1.0)))

    grid = np.linspace(1.09, 1.13, 401)
    best = grid[int(np.argmin([energy(s) for s in grid]))]
    assert best == pytest.approx(a, abs=1e-4)  # grid step 1e-4
    assert energy(a) < energy(2 ** (1 / 6))


@pytest.mark.parametrize("scale", [1.0, math.sqrt(2.0), 2.0])
def test_hexagonal_box_holds_whole_rows(scale):
    sig, rc = 0.3405, 3 * 0.3405
    lx, ly, (ny, nx) = lateral_box_nm("hexagonal", rc, sig, scale)
    a = CLOSE_PACKED_SPACING_SIGMA * sig
    assert lx == pytest.approx(nx * a)
    assert ly == pytest.approx(ny * a * math.sqrt(3) / 2)
    assert ny % 2 == 0  # a triangular layer repeats every two rows
    edge = max(2 * rc, 10 * sig) * scale
    assert lx >= edge - 1e-12 and ly >= edge - 1e-12
    # the smallest such box: one row fewer would be below the edge
    assert (nx - 1) * a < edge and (ny - 2) * a * math.sqrt(3) / 2 < edge
    # a perfect layer at that spacing is periodic in this box: every site has 6 neighbours
    # at distance a under the minimum image convention
    xs = [(k + 0.5 * (j % 2)) * a for j in range(ny) for k in range(nx)]
    ys = [j * a * math.sqrt(3) / 2 for j in range(ny) for _ in range(nx)]
    p = np.array([xs, ys]).T
    d = p[:, None, :] - p[None, :, :]
    d[..., 0] -= lx * np.round(d[..., 0] / lx)
    d[..., 1] -= ly * np.round(d[..., 1] / ly)
    dist = np.sqrt((d**2).sum(-1))
    near = np.sum(np.abs(dist - a) < 1e-9, axis=1)
    assert np.all(near == 6)
    assert dist[dist > 0].min() == pytest.approx(a)


def test_square_box_is_the_default_edge():
    lx, ly, rows = lateral_box_nm("square", 1.0215, 0.3405)
    assert lx == ly == 3.41 and rows == (0, 0)


def test_model_with_a_rectangular_box():
    probe = get_probe("argon")
    m = PoreModel(
        probe=probe,
        solid=default_solid(),
        geometry=SLIT,
        cutoff_nm=1.0215,
        box_nm=3.41,
        width_nm=1.0215,
    )
    h = with_lateral_box(m, "hexagonal")
    lx, ly, lz = h.box_lengths_nm
    assert lx != ly and lz == 1.0215
    assert h.pore_volume_nm3 == pytest.approx(lx * ly * (1.0215 - 0.34))
    assert h.describe()["lateral_box"] == "hexagonal"
    assert with_lateral_box(m, "square").box_lengths_nm == (3.41, 3.41, 1.0215)


def test_bad_lateral_box_is_refused():
    with pytest.raises(InputError, match="lateral_box"):
        lateral_box_nm("round", 1.0, 0.34)


def test_config_option(tmp_path):
    """model.lateral_box in a run config: the hexagonal box reaches the tasks' pore model; a
    box_nm beside it is refused, naming the field; the square default keeps the config hash of
    a config without the option."""
    from gcmc.pipeline.config import load_config
    from gcmc.pipeline.tasks import pore_model

    src = (Path(__file__).parent / "configs" / "tiny.toml").read_text()
    plain = tmp_path / "plain.toml"
    plain.write_text(src)
    square = tmp_path / "square.toml"
    square.write_text(src + '\n[model]\nlateral_box = "square"\n')
    hexa = tmp_path / "hex.toml"
    hexa.write_text(src + '\n[model]\nlateral_box = "hexagonal"\n')
    bad = tmp_path / "bad.toml"
    bad.write_text(src + '\n[model]\nlateral_box = "hexagonal"\nbox_nm = 4.0\n')
    assert load_config(plain).config_hash == load_config(square).config_hash
    cfg = load_config(hexa)
    assert cfg.lateral_box == "hexagonal" and cfg.box_y_nm > cfg.box_nm
    m = pore_model(cfg, 0)
    assert m.box_lengths_nm[:2] == (cfg.box_nm, cfg.box_y_nm)
    assert load_config(hexa).config_hash != load_config(plain).config_hash
    with pytest.raises(InputError, match="model.box_nm"):
        load_config(bad)
    worse = tmp_path / "worse.toml"
    worse.write_text(src + '\n[model]\nlateral_box = "round"\n')
    with pytest.raises(InputError, match="lateral_box"):
        load_config(worse)
