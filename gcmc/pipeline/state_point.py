"""One state point from a user's description: a probe, a pore (or bulk), a temperature and a
pressure or a fugacity -> the model, the bulk reservoir and the simulated point.

Shared by ``gcmc point`` and :func:`gcmc.api.run_point`. Every check raises an InputError
naming the offending parameter; ``names`` maps the parameter names used here
(``temperature_K``, ``pressure_Pa``, ``width_H_nm``, ...) to the names the caller shows its
user (the command line shows ``--temperature``, ``--pressure``, ``--width-H``, ...).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path

from gcmc.errors import InputError
from gcmc.physics.eos import make_eos
from gcmc.physics.model import BULK, SLIT, PoreModel, Probe, default_solid, get_probe
from gcmc.physics.potentials import default_box_nm, default_cutoff_nm
from gcmc.sampling.point import PointOutcome, SamplingSettings, ThermoState, simulate_point

#: Fewest trial moves of a point (the first fifth equilibrates; production must hold at least
#: 20 samples per block analysis at the default sampling interval).
MIN_MOVES = 10_000


def _name(names: Mapping[str, str] | None, key: str) -> str:
    return (names or {}).get(key, key)


def _finite(names: Mapping[str, str] | None, key: str, value: float | None) -> float | None:
    """None, or a finite number > 0 (else an InputError naming the parameter)."""
    if value is None:
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{_name(names, key)}: expected a number, got {value!r}") from None
    if not math.isfinite(v):
        raise InputError(f"{_name(names, key)}: must be a finite number, got {value}")
    if v <= 0:
        raise InputError(f"{_name(names, key)}: must be > 0, got {value}")
    return v


def resolve_probe(
    probe: str | Probe | None = None,
    *,
    epsilon_k: float | None = None,
    sigma_nm: float | None = None,
    probe_library: str | Path | None = None,
    names: Mapping[str, str] | None = None,
) -> Probe:
    """The probe: a name from a probe library (the package's own by default), a
    :class:`~gcmc.physics.model.Probe`, or an inline Lennard-Jones pair.

    Parameters
    ----------
    probe : str, Probe or None
        A library probe name (e.g. ``"argon"``) or a Probe; None for an inline probe.
    epsilon_k, sigma_nm : float, optional
        Inline probe: LJ epsilon/k in K and sigma in nm (both, and only without ``probe``).
    probe_library : str or Path, optional
        A TOML probe library of the user's own (the same key as ``[probe] library`` in a
        run config).
    names : mapping, optional
        Parameter name -> the name shown in error messages.

    Returns
    -------
    Probe
        The probe.
    """
    eps = _finite(names, "epsilon_k", epsilon_k)
    sig = _finite(names, "sigma_nm", sigma_nm)
    if isinstance(probe, Probe):
        return probe
    if probe:
        if eps is not None or sig is not None:
            raise InputError(
                f"{_name(names, 'probe')} and {_name(names, 'epsilon_k')}/"
                f"{_name(names, 'sigma_nm')}: give one or the other"
            )
        return get_probe(str(probe), Path(probe_library) if probe_library else None)
    if eps is not None and sig is not None:
        return Probe(name="inline", epsilon_k=eps, sigma_nm=sig)
    raise InputError(
        f"{_name(names, 'probe')} NAME, or {_name(names, 'epsilon_k')} K with "
        f"{_name(names, 'sigma_nm')} NM: a probe is needed"
    )


def point_model(
    probe: Probe,
    *,
    width_H_nm: float | None = None,
    width_w_nm: float | None = None,
    bulk: bool = False,
    box_nm: float | None = None,
    cutoff_nm: float | None = None,
    epsilon_sf_scale: float | None = None,
    names: Mapping[str, str] | None = None,
) -> PoreModel:
    """The pore model of one point: a graphitic slit of width H (or w = H - sigma_ss), or a
    periodic cube of bulk fluid.

    Parameters
    ----------
    probe : Probe
        The probe.
    width_H_nm, width_w_nm : float, optional
        The slit width, nucleus to nucleus (H) or internal (w = H - sigma_ss); give one, or
        ``bulk=True``.
    bulk : bool, optional
        A periodic cube of bulk fluid instead of a slit.
    box_nm : float, optional
        Periodic edge in nm (default max(2 x cutoff, 10 sigma)).
    cutoff_nm : float, optional
        LJ cutoff in nm (default 3 sigma).
    epsilon_sf_scale : float, optional
        Scale of the Lorentz-Berthelot solid-fluid epsilon.
    names : mapping, optional
        Parameter name -> the name shown in error messages.

    Returns
    -------
    PoreModel
        The model the engine simulates.
    """
    h = _finite(names, "width_H_nm", width_H_nm)
    w = _finite(names, "width_w_nm", width_w_nm)
    for key, value in (("box_nm", box_nm), ("cutoff_nm", cutoff_nm)):
        _finite(names, key, value)
    _finite(names, "epsilon_sf_scale", epsilon_sf_scale)
    given = sum(x is not None for x in (h, w)) + bool(bulk)
    if given != 1:
        raise InputError(
            f"{_name(names, 'width_H_nm')}, {_name(names, 'width_w_nm')} or "
            f"{_name(names, 'bulk')}: give exactly one"
        )
    solid = default_solid()
    if epsilon_sf_scale is not None:
        solid = replace(solid, epsilon_sf_scale=float(epsilon_sf_scale))
    if w is not None:
        h = w + solid.sigma_nm
    cutoff = float(cutoff_nm) if cutoff_nm is not None else default_cutoff_nm(probe)
    box = float(box_nm) if box_nm is not None else default_box_nm(cutoff, probe.sigma_nm)
    if cutoff > 0.5 * box:
        raise InputError(
            f"{_name(names, 'cutoff_nm')}: {cutoff:g} nm is larger than half the box ({box:g} nm)"
        )
    model = PoreModel(
        probe=probe,
        solid=solid,
        geometry=BULK if bulk else SLIT,
        cutoff_nm=cutoff,
        box_nm=box,
        width_nm=h or 0.0,
    )
    if not bulk and model.internal_width_nm <= 0:
        raise InputError(
            f"{_name(names, 'width_H_nm')}: H = {h:g} nm is not wider than sigma_ss "
            f"({solid.sigma_nm} nm): no pore volume"
        )
    return model


@dataclass(frozen=True)
class Reservoir:
    """The bulk reservoir of a point and how it was found.

    Attributes
    ----------
    state : ThermoState
        Temperature, fugacity and (where the equation of state gives them) pressure, bulk
        density and residual enthalpy; NaN where unavailable.
    eos : str
        The equation of state asked for.
    notes : list of str
        What is unavailable and why (empty when the EOS mapped the state).
    """

    state: ThermoState
    eos: str
    notes: list[str] = field(default_factory=list)


def bulk_reservoir(
    probe: Probe,
    temperature_K: float,
    *,
    pressure_Pa: float | None = None,
    fugacity_Pa: float | None = None,
    eos: str | None = None,
    names: Mapping[str, str] | None = None,
) -> Reservoir:
    """The bulk reservoir at a pressure (through the equation of state) or at a fugacity.

    A fugacity needs no equation of state: the simulation runs at the activity beta f. Where
    the EOS maps the fugacity to a bulk state, its pressure, density and residual enthalpy are
    recorded; where it cannot (e.g. a dense state beyond its range), they are NaN and a note
    says so, and the point is still simulated.

    Parameters
    ----------
    probe : Probe
        The probe.
    temperature_K : float
        Temperature in K.
    pressure_Pa, fugacity_Pa : float, optional
        Give exactly one.
    eos : str, optional
        ``reference``, ``peng-robinson``, ``lennard-jones`` or ``ideal`` (default:
        ``reference`` where the probe has one, else ``lennard-jones``).
    names : mapping, optional
        Parameter name -> the name shown in error messages.

    Returns
    -------
    Reservoir
        The state, the EOS name and notes.
    """
    t = _finite(names, "temperature_K", temperature_K)
    if t is None:
        raise InputError(f"{_name(names, 'temperature_K')}: missing")
    p = _finite(names, "pressure_Pa", pressure_Pa)
    f = _finite(names, "fugacity_Pa", fugacity_Pa)
    if (p is None) == (f is None):
        raise InputError(
            f"{_name(names, 'pressure_Pa')} or {_name(names, 'fugacity_Pa')}: give exactly one"
        )
    eos_name = eos or ("reference" if probe.reference_eos else "lennard-jones")
    model = make_eos(eos_name, probe)
    notes: list[str] = []
    if p is not None:
        bulk = model.state(t, p)
    else:
        try:
            bulk = model.state_from_fugacity(t, f)
        except InputError as exc:
            why = str(exc).removeprefix("fugacity_Pa: ")
            notes.append(
                f"pressure, bulk density, excess density and isosteric heat unavailable: {why}; "
                "the point is simulated at the given fugacity"
            )
            state = ThermoState(
                temperature_K=t,
                fugacity_Pa=f,
                pressure_Pa=math.nan,
                bulk_density_per_nm3=math.nan,
                residual_enthalpy_K=math.nan,
                eos="none",
            )
            return Reservoir(state=state, eos=model.name, notes=notes)
    state = ThermoState(
        temperature_K=t,
        fugacity_Pa=bulk.fugacity_Pa,
        pressure_Pa=bulk.pressure_Pa,
        bulk_density_per_nm3=bulk.density_per_nm3,
        residual_enthalpy_K=bulk.residual_enthalpy_K,
        eos=model.name,
    )
    return Reservoir(state=state, eos=model.name, notes=notes)


def point_settings(
    moves: int,
    replicas: int = 2,
    insertion_trials: int = 0,
    names: Mapping[str, str] | None = None,
) -> SamplingSettings:
    """Sampling settings of a single point: ``moves`` trial moves per replica, the first
    fifth equilibrating.

    Parameters
    ----------
    moves : int
        Trial moves per replica, at least :data:`MIN_MOVES`.
    replicas : int, optional
        Independent replicas (default 2: the second starts over-filled).
    insertion_trials : int, optional
        Trial positions per insertion (1 plain, k > 1 biased, 0 automatic).
    names : mapping, optional
        Parameter name -> the name shown in error messages.

    Returns
    -------
    SamplingSettings
        Validated settings.
    """
    if isinstance(moves, bool) or not isinstance(moves, int) or moves < MIN_MOVES:
        raise InputError(f"{_name(names, 'moves')}: at least {MIN_MOVES}, got {moves}")
    if isinstance(replicas, bool) or not isinstance(replicas, int) or replicas < 1:
        raise InputError(f"{_name(names, 'replicas')}: at least 1, got {replicas}")
    if not isinstance(insertion_trials, int) or insertion_trials < 0:
        raise InputError(
            f"{_name(names, 'insertion_trials')}: an integer >= 0, got {insertion_trials}"
        )
    eq = moves // 5
    settings = SamplingSettings(
        equilibration_moves=eq,
        production_moves=moves - eq,
        replicas=replicas,
        insertion_trials=insertion_trials,
    )
    settings.validate()
    return settings


def total_moves(settings: SamplingSettings) -> int:
    """All trial moves of a point: every replica, plus the over-filled start of the second
    (half an equilibration)."""
    per = settings.equilibration_moves + settings.production_moves
    extra = settings.equilibration_moves // 2 if settings.replicas > 1 else 0
    return per * settings.replicas + extra


def simulate(
    model: PoreModel,
    reservoir: Reservoir,
    settings: SamplingSettings,
    seed: int,
    progress: Callable[[int], None] | None = None,
) -> PointOutcome:
    """Simulate the point; ``progress(n)`` is called with the moves done since the last call.

    Parameters
    ----------
    model : PoreModel
        From :func:`point_model`.
    reservoir : Reservoir
        From :func:`bulk_reservoir`.
    settings : SamplingSettings
        From :func:`point_settings`.
    seed : int
        Random seed (one seed, one result).
    progress : callable, optional
        Called with the number of moves done since its last call.

    Returns
    -------
    PointOutcome
        The point's record (``result``) and final configuration.
    """
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise InputError(f"seed: a non-negative integer, got {seed!r}")
    return simulate_point(model, reservoir.state, settings, seed, progress=progress)
