"""Physical constants and unit conversions: the one place where units change.

Internally the engine works in nm and kelvin (energies as E/k in K). Everything
that crosses the project boundary (configs, CLI, kernel files, reports) is in the
units of the conventions: K, Pa, nm, molecules/nm^3, mmol/cm^3, kJ/mol.
"""

from __future__ import annotations

# CODATA 2018 exact values (SI redefinition).
BOLTZMANN_J_PER_K = 1.380649e-23
AVOGADRO_PER_MOL = 6.02214076e23
GAS_CONSTANT_J_PER_MOL_K = BOLTZMANN_J_PER_K * AVOGADRO_PER_MOL

NM3_PER_M3 = 1.0e27

#: 1 molecule/nm^3 = 1e27 / N_A mol/m^3 = 1/0.602214076 mmol/cm^3
MMOL_PER_CM3_PER_NM3 = 1.0e27 / AVOGADRO_PER_MOL / 1.0e3


def kelvin_to_kj_per_mol(energy_k: float) -> float:
    """Energy per molecule E/k (K) to kJ/mol."""
    return energy_k * GAS_CONSTANT_J_PER_MOL_K / 1000.0


def activity_per_nm3(fugacity_pa: float, temperature_k: float) -> float:
    """Activity z = beta*f in molecules per nm^3 (the kinetic factor cancels)."""
    return fugacity_pa / (BOLTZMANN_J_PER_K * temperature_k) / NM3_PER_M3


def fugacity_pa_from_activity(activity_nm3: float, temperature_k: float) -> float:
    """Inverse of :func:`activity_per_nm3`."""
    return activity_nm3 * NM3_PER_M3 * BOLTZMANN_J_PER_K * temperature_k


def per_nm3_to_mmol_per_cm3(density_nm3: float) -> float:
    """Number density in molecules/nm^3 to mmol/cm^3."""
    return density_nm3 * MMOL_PER_CM3_PER_NM3


def mol_per_m3_to_per_nm3(density_mol_m3: float) -> float:
    """Molar density in mol/m^3 to molecules/nm^3."""
    return density_mol_m3 * AVOGADRO_PER_MOL / NM3_PER_M3
