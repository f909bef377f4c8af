"""Hyper-parallel tempering in T and mu (gcmc.sampling.tempering)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from gcmc.physics.henry import pore_limit
from gcmc.physics.model import SLIT, PoreModel, Probe, Solid
from gcmc.physics.units import fugacity_pa_from_activity
from gcmc.sampling import ladder as L
from gcmc.sampling import tempering as TP
from gcmc.sampling.point import SamplingSettings, ThermoState

# Non-interacting molecules (eps_ff/k = 1e-6 K; see tests/test_ladder.py for the bound on
# their second virial coefficient) in a Steele slit whose wall is set by eps_sf: the exact
# mean N of each (T, z) ensemble is z A int_0^H exp(-V(z)/T) dz (exact limit; the quadrature
# of gcmc.physics.henry), and U = sum of wall energies depends on T, so a swap rule that
# leaves out the temperature term is biased.
WALL_PROBE = Probe(name="ideal-walled", epsilon_k=1.0e-6, sigma_nm=0.34, epsilon_sf_k=20.0)
BOX_NM = 2.0
H_NM = 1.0
TEMPS = (100.0, 112.0, 125.0, 140.0)
Z = 0.05  # molecules/nm^3: exact <N> = 2.90, 1.95, 1.39, 1.02 in the four rungs

# chi-square (4 degrees of freedom) at p = 0.001: 18.47 (standard table value)
CHI2_4_P001 = 18.47


def _model() -> PoreModel:
    return PoreModel(
        probe=WALL_PROBE,
        solid=Solid(),
        geometry=SLIT,
        cutoff_nm=0.9,
        box_nm=BOX_NM,
        width_nm=H_NM,
    )


def _states(z: float = Z) -> list[ThermoState]:
    return [
        ThermoState(temperature_K=t, fugacity_Pa=fugacity_pa_from_activity(z, t)) for t in TEMPS
    ]


def _exact_n(model: PoreModel, t: float, z: float) -> float:
    return z * BOX_NM * BOX_NM * pore_limit(model, t).boltzmann_integral_nm


SETTINGS = SamplingSettings(
    equilibration_moves=2_000,
    production_moves=200_000,
    sample_every=20,
    displacement_fraction=0.2,
    insertion_trials=1,
    replicas=1,
)


def _chi2(out: TP.TemperingOutcome, model: PoreModel) -> tuple[float, list[float]]:
    zs = []
    for p, t in zip(out.points, TEMPS, strict=True):
        r = p.result
        zs.append((r.molecules_mean - _exact_n(model, t, r.activity_per_nm3)) / r.molecules_stderr)
    return float(sum(z * z for z in zs)), zs


def test_swap_rule_reduces_to_the_known_limits():
    # equal temperatures: the chemical-potential ladder's (z_i/z_j)^(N_j - N_i)
    for zi, zj, ni, nj in ((1.0, 2.0, 3, 5), (2.0, 1.0, 3, 5), (0.3, 0.7, 9, 4)):
        assert TP.swap_acceptance(100.0, 100.0, zi, zj, ni, nj, -5.0, -9.0) == pytest.approx(
            L.swap_acceptance(zi, zj, ni, nj)
        )
    # equal activities and N: canonical parallel tempering exp[(1/T_i - 1/T_j)(U_i - U_j)]
    a = TP.swap_acceptance(100.0, 125.0, 1.0, 1.0, 7, 7, -900.0, -800.0)
    assert a == pytest.approx(math.exp((1 / 100 - 1 / 125) * (-100.0)))
    assert TP.swap_acceptance(100.0, 125.0, 1.0, 1.0, 7, 7, -800.0, -900.0) == 1.0
    # detailed balance of the pair: a(i<->j) / a(j<->i) = the product-weight ratio
    args = (100.0, 125.0, 0.02, 0.05, 4, 6, -700.0, -1100.0)
    ratio = (0.02 / 0.05) ** (6 - 4) * math.exp((1 / 100 - 1 / 125) * (-700.0 + 1100.0))
    fwd = TP.swap_acceptance(*args)
    rev_config = 1.0 / ratio  # the reverse swap sees the inverse ratio
    assert fwd == pytest.approx(min(1.0, ratio))
    assert min(1.0, rev_config) * ratio == pytest.approx(fwd) or fwd == 1.0


def test_tempering_keeps_each_ensemble(engine):
    """Detailed balance of the T and mu swaps: with a swap every 20 moves per box (swap
    acceptance tens of %), each rung's mean N is the exact z A int exp(-V/T) dz."""
    model = _model()
    out = TP.simulate_tempering(model, _states(), SETTINGS, seed=7, round_moves=20)
    acc = out.swap_acceptance
    assert np.all(acc > 0.2), acc  # swaps happen, so the check has teeth
    chi2, zs = _chi2(out, model)
    assert chi2 < CHI2_4_P001, zs  # a false failure has p = 0.001
    assert out.renewals[0] > 0  # the cold rung receives boxes that were at the hot end


def test_wrong_swap_rule_is_detected(engine):
    """The same check has power: the chemical-potential-only rule used across temperatures
    (the energy term left out) pulls the rungs' N towards each other and fails it."""
    model = _model()

    def wrong(ti, tj, zi, zj, ni, nj, ui, uj):  # noqa: ANN001, ANN202
        return L.swap_acceptance(zi, zj, ni, nj)

    out = TP.simulate_tempering(model, _states(), SETTINGS, seed=7, round_moves=20, swap_rule=wrong)
    chi2, zs = _chi2(out, model)
    assert chi2 > 3 * CHI2_4_P001, zs


def test_tempering_is_deterministic(engine):
    model = _model()
    s = SamplingSettings(
        equilibration_moves=1_000,
        production_moves=4_000,
        sample_every=20,
        insertion_trials=1,
        replicas=1,
    )
    a = TP.simulate_tempering(model, _states(), s, seed=5, round_moves=40)
    b = TP.simulate_tempering(model, _states(), s, seed=5, round_moves=40)
    for pa, pb in zip(a.points, b.points, strict=True):
        np.testing.assert_array_equal(pa.series_n, pb.series_n)
        np.testing.assert_array_equal(pa.positions, pb.positions)
    np.testing.assert_array_equal(a.swap_accepts, b.swap_accepts)


def test_registry_names_the_methods():
    from gcmc.errors import InputError

    assert TP.ladder_method("tempering").run is TP.simulate_tempering
    assert "exchange" in TP.LADDER_METHODS
    with pytest.raises(InputError, match="unknown"):
        TP.ladder_method("annealing")


def test_hot_chain_is_geometric():
    ts = TP.hot_chain_temperatures(87.3, 122.0, 4)
    assert ts[0] == 87.3 and ts[-1] == pytest.approx(122.0)
    r = np.diff(np.log(ts))
    assert np.allclose(r, r[0])
