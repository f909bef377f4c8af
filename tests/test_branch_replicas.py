"""Where a point's second replica starts, and why a hysteresis kernel needs it on its branch.

Inside a capillary-condensation loop both the gas-like and the condensed pore are (meta)stable;
the over-filled second replica condenses and stays there, so the point's replicas disagree and
their pooled mean lies between the branches. With ``second_replica = "branch"`` both replicas
start where the branch's ladder (or, for a cold rerun, its side: empty for adsorption,
over-filled for desorption) puts them.

System: argon (reference EOS, CoolProp) at 100 K in a 3 nm graphite slit, p/p0 = 0.35: inside
the loop that this pore shows between p/p0 ~ 0.15 and 0.6 at this temperature
(tests/configs/equilibrium.toml, the equilibrium-branch tests). The two states differ by a
factor of about 2 in N (film ~ 115-120, condensed ~ 235 molecules in the 2.1 nm box; measured
with these settings), against replica fluctuations of a few per cent, so the ratios below
leave a wide margin either way.
"""

from __future__ import annotations

from dataclasses import replace

import pytest

from gcmc.errors import InputError
from gcmc.physics.eos import make_eos
from gcmc.physics.model import get_probe
from gcmc.physics.potentials import slit_pore
from gcmc.pipeline.config import parse_config
from gcmc.sampling.point import SamplingSettings, ThermoState, simulate_point


@pytest.fixture(scope="module")
def loop_point():
    probe = get_probe("argon")
    eos = make_eos("reference", probe)
    t = 100.0
    b = eos.state(t, 0.35 * eos.saturation_pressure(t))
    state = ThermoState(
        temperature_K=t,
        fugacity_Pa=b.fugacity_Pa,
        pressure_Pa=b.pressure_Pa,
        bulk_density_per_nm3=b.density_per_nm3,
        eos="reference",
    )
    settings = SamplingSettings(
        equilibration_moves=40_000, production_moves=200_000, sample_every=100
    )
    return slit_pore(probe, width_nm=3.0, box_nm=2.1), state, settings


def _means(model, state, settings, from_above=False):
    r = simulate_point(model, state, settings, 5, from_above=from_above).result
    lo, hi = sorted(r.replica_means)
    return lo, hi


def test_the_over_filled_replica_leaves_the_branch_inside_a_loop(engine, loop_point):
    model, state, settings = loop_point
    lo, hi = _means(model, state, settings)
    assert hi > 1.5 * lo  # one film, one condensed: the point straddles the loop


def test_branch_replicas_stay_on_their_branch(engine, loop_point):
    model, state, settings = loop_point
    branch = replace(settings, second_replica="branch")
    film = _means(model, state, branch)
    assert film[1] < 1.15 * film[0]  # both gas-like (adsorption side)
    condensed = _means(model, state, branch, from_above=True)
    assert condensed[1] < 1.15 * condensed[0]  # both condensed (desorption side)
    assert condensed[0] > 1.5 * film[1]


def _config(tmp_path, sampling: str):
    text = f"""
seed = 1
[kernel]
name = "k"
output = "out"
[probe]
library_name = "argon"
[widths]
H_nm = [1.0]
[temperatures]
K = [100.0]
[pressures]
p_p0 = [0.1, 0.5]
descending = true
[sampling]
{sampling}
"""
    import tomllib

    return parse_config(tomllib.loads(text), text, tmp_path / "c.toml")


def test_second_replica_config_key(tmp_path):
    default = _config(tmp_path, "")
    same = _config(tmp_path, 'second_replica = "over-filled"')
    branch = _config(tmp_path, 'second_replica = "branch"')
    assert default.sampling.second_replica == "over-filled"
    assert branch.sampling.second_replica == "branch"
    # the default does not enter the hash (kernels built before stay up to date)
    assert same.config_hash == default.config_hash
    assert branch.config_hash != default.config_hash
    assert branch.task_hash != default.task_hash
    with pytest.raises(InputError, match=r"sampling\.second_replica: 'above' is not one of"):
        _config(tmp_path, 'second_replica = "above"')
