"""The probe library (gcmc/physics/data/probes.toml) and inline probe tables."""

from __future__ import annotations

import math

import CoolProp.CoolProp as CP
import pytest

from gcmc.errors import InputError
from gcmc.physics.eos import make_eos
from gcmc.physics.model import Probe, get_probe, load_probe_library, probe_from_table

LIBRARY = load_probe_library()

NUMERIC_FIELDS = (
    "epsilon_k",
    "sigma_nm",
    "molar_mass_g_mol",
    "critical_temperature_K",
    "critical_pressure_Pa",
    "acentric_factor",
)


def test_library_is_not_empty():
    # The gases of the recommended characterisation protocols (Thommes et al., Pure Appl.
    # Chem. 87 (2015) 1051: N2 at 77 K, Ar at 87 K, CO2 at 273 K) must be there.
    assert {"argon", "nitrogen", "carbon_dioxide"} <= set(LIBRARY)


@pytest.mark.parametrize("key", sorted(LIBRARY))
def test_probe_has_all_fields_and_sources(key):
    probe = LIBRARY[key]
    assert isinstance(probe, Probe)
    for field in NUMERIC_FIELDS:
        value = getattr(probe, field)
        assert isinstance(value, float) and math.isfinite(value), field
    for field in NUMERIC_FIELDS[:-1]:  # the acentric factor may be negative (argon, krypton)
        assert getattr(probe, field) > 0.0, field
    assert probe.reference_eos, "library probes all have a reference EOS in CoolProp"
    # Every number has a named source: the LJ pair and the critical constants.
    for part in ("lj", "critical"):
        assert probe.sources.get(part, "").strip(), f"{key}: sources.{part} missing"


@pytest.mark.parametrize("key", sorted(LIBRARY))
def test_critical_constants_match_coolprop(key):
    # Source: the reference EOS of each gas as implemented in CoolProp (the library states
    # that its critical constants are read from it). Tolerance 0.1 %; acentric factors are
    # printed to 5 decimals, hence an absolute floor of 1e-5.
    probe = LIBRARY[key]
    st = CP.AbstractState("HEOS", probe.reference_eos)
    assert probe.critical_temperature_K == pytest.approx(st.T_critical(), rel=1e-3)
    assert probe.critical_pressure_Pa == pytest.approx(st.p_critical(), rel=1e-3)
    assert probe.acentric_factor == pytest.approx(st.acentric_factor(), rel=1e-3, abs=1e-5)
    assert probe.molar_mass_g_mol == pytest.approx(st.molar_mass() * 1e3, rel=1e-3)


@pytest.mark.parametrize("key", sorted(LIBRARY))
def test_every_library_probe_has_every_eos(key):
    # A library probe must work with all four equations of state (the reference one is the
    # default); one state each, at 1.2 Tc and 1 bar (a dilute supercritical gas: Z close to
    # 1 by the ideal-gas limit, within 1 % at p/pc <= 0.03).
    probe = LIBRARY[key]
    t = 1.2 * probe.critical_temperature_K
    for name in ("reference", "peng-robinson", "lennard-jones", "ideal"):
        s = make_eos(name, probe).state(t, 1.0e5)
        assert s.compressibility == pytest.approx(1.0, abs=0.01), name


def test_get_probe_by_loose_name():
    assert get_probe("Carbon dioxide").name == "carbon_dioxide"
    with pytest.raises(InputError, match="unknown"):
        get_probe("unobtanium")


GOOD_TABLE = {
    "epsilon_k": 120.0,
    "sigma_nm": 0.34,
    "critical_temperature_K": 150.0,
    "critical_pressure_Pa": 4.8e6,
    "acentric_factor": 0.0,
    "sources": {"lj": "invented for a test"},
}


def test_inline_probe_table_is_accepted():
    probe = probe_from_table("my_gas", dict(GOOD_TABLE), where="run.toml:probe")
    assert probe.name == "my_gas" and probe.epsilon_k == 120.0
    assert probe.reference_eos == ""  # no reference EOS: peng-robinson works, reference not
    assert make_eos("peng-robinson", probe).state(300.0, 1e5).phase == "supercritical"
    with pytest.raises(InputError, match="reference_eos"):
        make_eos("reference", probe)


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"sigma_nm": None}, "sigma_nm"),  # missing
        ({"epsilon_k": None}, "epsilon_k"),  # missing
        ({"epsilon_k": -120.0}, "epsilon_k"),  # negative
        ({"sigma_nm": 0.0}, "sigma_nm"),
        ({"sigma_nm": "0.34"}, "sigma_nm"),  # not a number
        ({"critical_pressure_Pa": math.nan}, "critical_pressure_Pa"),
        ({"epsilon_sf_scale": -1.0}, "epsilon_sf_scale"),
        ({"reference_eos": 3}, "reference_eos"),
        ({"colour": "blue"}, "colour"),  # unknown field
    ],
)
def test_inline_probe_table_is_validated(change, field):
    table = dict(GOOD_TABLE)
    for key, value in change.items():
        if value is None:
            table.pop(key)
        else:
            table[key] = value
    with pytest.raises(InputError, match=field) as err:
        probe_from_table("my_gas", table, where="run.toml:probe")
    assert "\n" not in str(err.value)  # one-line message
