"""Replica exchange along a pressure ladder (gcmc.sampling.ladder)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from gcmc.physics.model import BULK, SLIT, PoreModel, Probe, Solid
from gcmc.physics.units import fugacity_pa_from_activity
from gcmc.sampling import ladder as L
from gcmc.sampling.point import SamplingSettings, ThermoState

T = 300.0
# Near-ideal gas: eps/k = 1e-6 K. The overlap core (beta u > 200) then has radius
# 0.34 nm x (4e-6/(200 x 300))^(1/12) = 0.034 nm and beta u > 1e-3 only inside ~0.09 nm, so the
# second virial coefficient is |B2| < (2 pi/3) 0.09^3 = 1.6e-3 nm^3: at rho <= 0.6 nm^-3 the
# mean N deviates from z V by < 2 B2 rho = 0.2 %, well below the 3-sigma statistical band
# (~2-4 % here). The exact reference is the ideal-gas limit <N> = z V (Poisson).
IDEAL = Probe(name="ideal", epsilon_k=1.0e-6, sigma_nm=0.34)
BOX_NM = 2.0
ACTIVITIES = (0.15, 0.25, 0.4, 0.6)  # molecules/nm^3; zV = 1.2 ... 4.8 in 8 nm^3


def _ideal_model() -> PoreModel:
    return PoreModel(probe=IDEAL, solid=Solid(), geometry=BULK, cutoff_nm=1.0, box_nm=BOX_NM)


def _states(activities=ACTIVITIES, temperature=T) -> list[ThermoState]:
    return [
        ThermoState(
            temperature_K=temperature, fugacity_Pa=fugacity_pa_from_activity(z, temperature)
        )
        for z in activities
    ]


FAST = SamplingSettings(
    equilibration_moves=2_000,
    production_moves=60_000,
    sample_every=20,
    displacement_fraction=0.2,
    insertion_trials=1,
    replicas=1,
)


# chi-square (4 degrees of freedom, one per rung) at p = 0.001: 18.47 (standard table value)
CHI2_4_P001 = 18.47


def _ideal_check(out: L.LadderOutcome, volume: float) -> tuple[float, list[float]]:
    """sum of squared z-scores of the rungs' mean N against the exact z V, and the z-scores."""
    zs = []
    for p in out.points:
        r = p.result
        zs.append((r.molecules_mean - r.activity_per_nm3 * volume) / r.molecules_stderr)
    return float(sum(z * z for z in zs)), zs


def test_swap_rule_is_the_grand_canonical_ratio():
    # (z_i/z_j)^(N_j - N_i), capped at 1 (module docstring derivation).
    assert L.swap_acceptance(1.0, 2.0, 3, 5) == pytest.approx(0.25)
    assert L.swap_acceptance(2.0, 1.0, 3, 5) == 1.0
    assert L.swap_acceptance(1.0, 2.0, 5, 3) == 1.0
    assert L.swap_acceptance(1.0, 3.0, 4, 4) == 1.0


def test_ideal_gas_ladder_keeps_each_ensemble(engine):
    """Detailed balance of the swaps: with frequent swaps (every 40 moves per box, swap
    acceptance tens of %) each rung's mean N is still the exact ideal-gas z V."""
    model = _ideal_model()
    out = L.simulate_ladder(model, _states(), FAST, seed=11, round_moves=40)
    acc = out.swap_acceptance
    assert np.all(acc > 0.2), acc  # swaps do happen, so the check below has teeth
    chi2, zs = _ideal_check(out, model.volume_nm3)
    # independent rungs' z-scores: chi-square with 4 dof; a false failure has p = 0.001
    assert chi2 < CHI2_4_P001, zs
    # Poisson: var N = <N> for the ideal gas (exact); series_n is the analysed series.
    for p in out.points:
        n = p.series_n.astype(float)
        assert np.var(n) == pytest.approx(n.mean(), rel=0.15)  # ~3 sigma of a variance
        # estimate from ~3000 samples with inefficiency of a few


def test_wrong_swap_rule_is_detected(engine, monkeypatch):
    """The ideal-gas check has power: accepting every swap breaks detailed balance (rung N
    means are pulled towards their neighbours) and the same check fails."""
    monkeypatch.setattr(L, "swap_acceptance", lambda zi, zj, ni, nj: 1.0)
    model = _ideal_model()
    settings = SamplingSettings(
        replicas=1,
        equilibration_moves=2_000,
        production_moves=120_000,
        sample_every=20,
        displacement_fraction=0.2,
        insertion_trials=1,
    )
    out = L.simulate_ladder(model, _states(), settings, seed=11, round_moves=20)
    chi2, zs = _ideal_check(out, model.volume_nm3)
    assert chi2 > 3 * CHI2_4_P001, zs


def test_ladder_is_deterministic(engine):
    model = _ideal_model()
    s = SamplingSettings(
        equilibration_moves=1_000,
        production_moves=4_000,
        sample_every=20,
        insertion_trials=1,
        replicas=2,
    )
    a = L.simulate_ladder(model, _states(), s, seed=5, round_moves=40)
    b = L.simulate_ladder(model, _states(), s, seed=5, round_moves=40)
    c = L.simulate_ladder(model, _states(), s, seed=6, round_moves=40)
    for pa, pb in zip(a.points, b.points, strict=True):
        np.testing.assert_array_equal(pa.series_n, pb.series_n)
        np.testing.assert_array_equal(pa.positions, pb.positions)
        assert pa.result.molecules_mean == pb.result.molecules_mean
    np.testing.assert_array_equal(a.swap_accepts, b.swap_accepts)
    assert any(
        not np.array_equal(pa.series_n, pc.series_n)
        for pa, pc in zip(a.points, c.points, strict=True)
    )


def test_swaps_accepted_between_close_pressures_in_a_pore(engine):
    """Argon-like LJ in a 1.2 nm slit at 120 K: activities 5 % apart have overlapping N
    distributions, so a good share of swaps is accepted. Records come back in the order
    given, with the swap acceptance of their neighbour pairs."""
    probe = Probe(name="lj", epsilon_k=120.0, sigma_nm=0.34)
    model = PoreModel(
        probe=probe, solid=Solid(), geometry=SLIT, cutoff_nm=0.85, box_nm=1.8, width_nm=1.2
    )
    s = SamplingSettings(
        replicas=1,
        equilibration_moves=5_000,
        production_moves=10_000,
        sample_every=50,
        insertion_trials=1,
    )
    zs = (2.1e-3, 2.0e-3, 2.2e-3)
    out = L.simulate_ladder(model, _states(zs, 120.0), s, seed=3)
    got = [p.result.activity_per_nm3 for p in out.points]
    assert got == pytest.approx(list(zs), rel=1e-12)
    assert np.all(out.swap_acceptance > 0.3), out.swap_acceptance
    assert math.isfinite(out.points[1].result.acceptance["swap_upper"])
    assert math.isnan(out.points[1].result.acceptance["swap_lower"])  # lowest rung


def test_ladder_rejects_mixed_temperatures():
    from gcmc.errors import InputError

    states = _states()[:1] + _states(temperature=310.0)[:1]
    with pytest.raises(InputError, match="same temperature"):
        L.simulate_ladder(_ideal_model(), states, FAST, seed=1)


def test_both_replica_ladders_sample_each_rung_with_one_insertion_method(engine):
    """Automatic insertion method on an exchange ladder with two replicas (the second
    over-filled): each rung's replicas sample with one method, decided per rung from both
    (gcmc.sampling.point.shared_insertion_trials). Methane-like LJ (148 K, 0.373 nm) in a 1 nm
    slit at 298 K from a few molecules to a filled pore, so that the rule picks plain
    insertion at the bottom of the ladder and biased insertion at the top."""
    from gcmc.physics.model import default_solid

    probe = Probe(name="lj-methane", epsilon_k=148.0, sigma_nm=0.373)
    model = PoreModel(
        probe=probe,
        solid=default_solid(),
        geometry=SLIT,
        cutoff_nm=3.0 * probe.sigma_nm,
        box_nm=3.0,
        width_nm=1.0,
    )
    s = SamplingSettings(
        replicas=2, equilibration_moves=8_000, production_moves=4_000, sample_every=50
    )
    states = [ThermoState(temperature_K=298.15, fugacity_Pa=f) for f in (1.0e4, 1.0e7)]
    out = L.simulate_ladder(model, states, s, seed=4)
    ks = [p.result.replica_insertion_trials for p in out.points]
    assert all(len(k) == 2 and len(set(k)) == 1 for k in ks), ks
    assert ks[0][0] == 1 and ks[-1][0] == s.biased_trials, ks
