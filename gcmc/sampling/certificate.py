"""A certificate for a filled (dense, subcritical) point: independent preparations that agree.

A filled micropore below the critical temperature can freeze into one packing; block errors
then read near zero and two replicas may agree by sharing the same packing. A point is
**certified** here only when all of this holds:

1. independent preparations of the point, each a hyper-parallel tempering chain
   (:mod:`gcmc.sampling.tempering`: the kernel temperature plus hotter rungs) started
   differently (from an empty pore "below", twice with different seeds; over-filled at
   ``overfill_factor`` z; "annealed": every rung started from a cooling path that begins at
   the hottest rung), give mean densities at the kernel temperature whose range is within
   ``tolerance`` (1 %) of their mean;
2. no preparation drifts (first half against second half of its production, the sampler's
   drift test);
3. each preparation's content at the kernel temperature was renewed at least
   ``min_renewals`` times in production: arrivals of configurations that were molten at the
   hottest rung in between, plus accepted insertions + deletions per molecule;
4. the box-size check agrees: the same preparation "below" in a lateral box of ``box_scale``
   x the edge (a hexagonal box, see gcmc.physics.potentials.lateral_box_nm) gives the same
   density within ``tolerance``.

Why that many renewals. The preparations' means scatter by about sd(N)/sqrt(k) when each saw
k independent packings, with sd(N) the spread of N between packings; the instantaneous
standard deviation of N at the kernel temperature is the estimate of that spread used here.
The expected range of 4 normal samples is d_4 = 2.059 standard deviations (the d_2 constant
of control charts for n = 4, a standard table value), so a range within ``tolerance`` x mean
needs k >= (d_4 sd(N) / (tolerance mean))^2; at least MIN_RENEWALS_FLOOR = 3 are asked in any
case ("several", and enough to tell a renewal from a lucky swap). When sd(N) is tiny (a
frozen packing) the floor decides.

Points that fail stay uncertified, with the reasons in ``flags``: the kinds of
:data:`gcmc.kernel.flags.CERTIFICATE_FLAGS`, defined with every other point flag in
:mod:`gcmc.kernel.flags` (the kernel's one table of flags). The escalation of a
quality-target build (:mod:`gcmc.pipeline.escalation`) calls :func:`certify_filled_point` by
the method name ``"certified-tempering"`` of POINT_METHODS, as its last step for dense
subcritical points.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace
from typing import Any

import numpy as np

from gcmc.errors import InputError
from gcmc.kernel import flags as fl
from gcmc.physics.model import SLIT, PoreModel
from gcmc.physics.potentials import with_lateral_box
from gcmc.sampling.box import Box
from gcmc.sampling.point import PointResult, SamplingSettings, ThermoState, simulate_point
from gcmc.sampling.tempering import TemperingOutcome, hot_chain_temperatures, simulate_tempering

#: expected range of 4 independent normal samples, in standard deviations (d_2, n = 4)
D2_FOUR = 2.059
MIN_RENEWALS_FLOOR = 3


#: the hottest rung stays below this fraction of the probe's critical temperature (the hot
#: rungs follow the point's p/p0, which needs a saturation pressure)
HOT_MAX_REDUCED_T = 0.9
#: tempering needs hot rungs at least this much hotter than the kernel temperature (the
#: filled argon bilayer melts between about 1.3 and 1.4 T_0: benchmarks/README.md, "Dense
#: confined phases"); a point closer to T_c than HOT_MAX_REDUCED_T / MIN_HOT_FACTOR = 0.82 T_c
#: has no room for them, and its pore fluid is mobile (SF6 at 298 K, T/T_c = 0.94; CO2 at
#: 273 K, 0.90): the point-wise sampler's longer runs serve it, not the certificate
MIN_HOT_FACTOR = 1.1


@dataclass(frozen=True)
class CertifySettings:
    """How a filled point is certified (defaults: benchmarks/README.md, "Dense confined
    phases")."""

    equilibration_moves: int = 200_000  # per rung of a chain
    production_moves: int = 1_000_000  # per rung of a chain, first attempt (doubled after)
    sample_every: int = 100
    #: moves per box between swap attempts: about one move per molecule of a filled 3 sigma
    #: pore; 10x longer rounds gave 3-10x fewer arrivals from the hot end per move
    round_moves: int = 100
    #: hotter rungs in the small box (the larger box of the box-size check gets
    #: hot_rungs x sqrt(area ratio): the energy fluctuations grow as sqrt(N)); 10 rungs over
    #: 87.3 -> 122 K kept every swap acceptance at 0.38-0.62 for argon in a 3 sigma pore,
    #: 5 rungs left 0.10 across the bilayer's melting and froze the cold end
    hot_rungs: int = 10
    #: hottest rung: T_0 x hot_factor, at most hot_max_reduced_t x T_c of the probe (and at
    #: least MIN_HOT_FACTOR x T_0: :func:`dense_subcritical_state`)
    hot_factor: float = 1.4
    hot_max_reduced_t: float = HOT_MAX_REDUCED_T
    #: p/p0 of the hottest rung (rungs in between: linear in the rung index); None: the
    #: point's own p/p0 at every rung (a lower p/p0 at the hot end widened the melting gap)
    hot_relative_pressure: float | None = None
    tolerance: float = 0.01
    box_scale: float = math.sqrt(2.0)
    overfill_factor: float = 20.0
    #: CPU seconds (process time) allowed in all; attempts double production until certified
    budget_cpu_s: float = 600.0
    #: > 0: the budget in moves instead: attempts double production while the doubled
    #: production per rung stays within this, and process time is not consulted, so that the
    #: result depends on the seed and the settings alone (a resumed build gets the same
    #: point); a build converts its CPU budget with gcmc.pipeline.escalation
    max_production_moves: int = 0
    insertion_trials: int = 0


@dataclass
class Preparation:
    """One independent preparation: its chain's result at the kernel temperature."""

    name: str
    box_nm: tuple[float, float]
    molecules_mean: float
    molecules_stderr: float
    molecules_sd: float
    density_per_nm3: float
    drift_z: float
    drift_passed: bool
    renewals_hot: int
    exchanges: int
    renewals: float
    swap_acceptance: list[float]
    cpu_s: float
    result: PointResult = field(repr=False)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d.pop("result")
        return d


@dataclass
class Certificate:
    """The verdict on one filled point."""

    certified: bool
    method: str
    density_per_nm3: float
    density_spread_rel: float
    box_difference_rel: float
    min_renewals: int
    preparations: list[Preparation]
    box_check: Preparation | None
    flags: list[str]
    cpu_s: float
    production_moves: int
    result: PointResult

    def to_dict(self) -> dict[str, Any]:
        d = {k: v for k, v in asdict(self).items() if k not in ("preparations", "box_check")}
        d["preparations"] = [p.to_dict() for p in self.preparations]
        d["box_check"] = self.box_check.to_dict() if self.box_check else None
        d["result"] = self.result.to_dict()
        return d


#: pore density rho sigma^3 above which a subcritical point counts as dense: between the LJ
#: critical density (about 0.31, Thol et al. 2016) and the liquid at the triple point (about
#: 0.84; both from memory)
DENSE_FILLING = 0.5


def is_dense_subcritical(model: PoreModel, temperature_K: float, density_per_nm3: float) -> bool:
    """Whether a point needs the certified path: a slit below the probe's critical temperature
    whose pore density (per pore volume) times sigma^3 exceeds DENSE_FILLING (liquid- or
    solid-like)."""
    return dense_subcritical_state(
        model.geometry,
        temperature_K,
        model.probe.critical_temperature_K,
        model.probe.sigma_nm,
        density_per_nm3,
    )


def dense_subcritical_state(
    geometry: str,
    temperature_K: float,
    critical_temperature_K: float,
    sigma_nm: float,
    density_per_nm3: float,
) -> bool:
    """:func:`is_dense_subcritical` on plain numbers (e.g. a kernel's probe and points): a
    slit, T below a finite critical temperature, and density x sigma^3 > DENSE_FILLING (a NaN
    density or sigma is not dense), and T at most HOT_MAX_REDUCED_T / MIN_HOT_FACTOR x T_c
    (room for the certificate's hot rungs)."""
    tc = critical_temperature_K
    if geometry != SLIT or not math.isfinite(tc):
        return False
    if not temperature_K * MIN_HOT_FACTOR <= HOT_MAX_REDUCED_T * tc:
        return False
    return bool(density_per_nm3 * sigma_nm**3 > DENSE_FILLING)


def _hot_states(
    model: PoreModel, state: ThermoState, cs: CertifySettings, eos: Any
) -> list[ThermoState]:
    t0 = state.temperature_K
    tc = model.probe.critical_temperature_K
    t_hot = t0 * cs.hot_factor
    if math.isfinite(tc):
        t_hot = min(t_hot, cs.hot_max_reduced_t * tc)
    if not t_hot >= t0 * MIN_HOT_FACTOR:
        raise InputError(
            f"certificate: T = {t0:g} K leaves no room for hot rungs (the hottest may be "
            f"{t_hot:.4g} K, at least {MIN_HOT_FACTOR:g} x T needed): use the point-wise sampler"
        )
    temps = hot_chain_temperatures(t0, t_hot, cs.hot_rungs)
    p0 = eos.saturation_pressure(t0)
    # the point's p/p0 (its fugacity where the EOS gave no pressure: the hot rungs only need
    # a path, any path keeps the kernel rung exact)
    x0 = (state.pressure_Pa if math.isfinite(state.pressure_Pa) else state.fugacity_Pa) / p0
    out = [state]
    k_hot = len(temps) - 1
    x_hot = x0 if cs.hot_relative_pressure is None else cs.hot_relative_pressure
    for k, t in enumerate(temps[1:], start=1):
        x = x0 + (x_hot - x0) * k / k_hot
        b = eos.state(t, x * eos.saturation_pressure(t))
        out.append(
            ThermoState(
                temperature_K=t,
                fugacity_Pa=b.fugacity_Pa,
                pressure_Pa=b.pressure_Pa,
                bulk_density_per_nm3=b.density_per_nm3,
                residual_enthalpy_K=b.residual_enthalpy_K,
                eos=state.eos,
            )
        )
    return out


def _anneal(
    model: PoreModel,
    states: list[ThermoState],
    moves: int,
    cs: CertifySettings,
    seed: np.random.SeedSequence,
) -> list[np.ndarray]:
    """A cooling path from the hottest rung down to the kernel temperature, ``moves`` per
    stage (one replica, no over-fill); the configuration reached at each rung."""
    stage = SamplingSettings(
        equilibration_moves=moves // 2,
        production_moves=max(moves // 2, 20 * cs.sample_every),
        sample_every=cs.sample_every,
        replicas=1,
        insertion_trials=cs.insertion_trials,
    )
    configs: list[np.ndarray] = [np.zeros((0, 3))] * len(states)
    pos: np.ndarray | None = None
    for k, s in zip(reversed(range(len(states))), seed.spawn(len(states)), strict=True):
        out = simulate_point(model, states[k], stage, s, start=pos)
        pos = out.positions
        configs[k] = pos
    return configs


def _prepare(
    name: str,
    model: PoreModel,
    states: list[ThermoState],
    cs: CertifySettings,
    production: int,
    seed: np.random.SeedSequence,
    progress: Callable[[int], None] | None,
    box_class: type[Box] = Box,
) -> Preparation:
    t = time.process_time()
    settings = SamplingSettings(
        equilibration_moves=cs.equilibration_moves,
        production_moves=production,
        sample_every=cs.sample_every,
        replicas=1,
        insertion_trials=cs.insertion_trials,
        overfill_factor=cs.overfill_factor,
    )
    a, b = seed.spawn(2)
    starts = None
    if name == "annealed":
        starts = _anneal(model, states, cs.equilibration_moves, cs, a)
    out: TemperingOutcome = simulate_tempering(
        model,
        states,
        settings,
        b,
        starts=starts,
        round_moves=cs.round_moves,
        overfill=(name == "overfilled"),
        progress=progress,
        box_class=box_class,
    )
    r = out.points[0].result
    n = out.points[0].series_n.astype(float)
    from gcmc.sampling.statistics import drift_test

    d = drift_test(n) if len(n) >= 40 else None
    lx, ly, _ = model.box_lengths_nm
    return Preparation(
        name=name,
        box_nm=(lx, ly),
        molecules_mean=r.molecules_mean,
        molecules_stderr=r.molecules_stderr,
        molecules_sd=float(np.std(n)) if len(n) else math.nan,
        density_per_nm3=r.density_per_nm3,
        drift_z=float(d.z_score) if d else math.nan,
        drift_passed=bool(d.passed) if d else False,
        renewals_hot=int(out.renewals[0]),
        exchanges=int(out.exchanges[0]),
        renewals=out.content_renewals(0),
        swap_acceptance=[float(x) for x in out.swap_acceptance],
        cpu_s=time.process_time() - t,
        result=r,
    )


def required_renewals(preps: list[Preparation], tolerance: float) -> int:
    """k >= (d_4 sd(N) / (tolerance mean))^2, at least MIN_RENEWALS_FLOOR (module docstring);
    sd(N)/mean is the median over the preparations (one drifting preparation, whose spread
    includes its drift, is flagged on its own and does not set the bar for the others)."""
    rel = [
        p.molecules_sd / p.molecules_mean
        for p in preps
        if p.molecules_mean > 0 and math.isfinite(p.molecules_sd)
    ]
    if not rel:
        return MIN_RENEWALS_FLOOR
    need = (D2_FOUR * float(np.median(rel)) / tolerance) ** 2
    return max(MIN_RENEWALS_FLOOR, math.ceil(need))


PREPARATIONS = ("below", "overfilled", "annealed", "below-2")


def certify_filled_point(
    model: PoreModel,
    state: ThermoState,
    seed: np.random.SeedSequence | int,
    settings: CertifySettings | None = None,
    eos: Any = None,
    progress: Callable[[int], None] | None = None,
    box_class: type[Box] = Box,
    method: str = "certified-tempering",
) -> Certificate:
    """Certify (or flag) a filled point by independent tempering preparations and a box-size
    check (module docstring). ``box_class``/``method``: the Box type of every rung (default:
    the engine's moves; gcmc.sampling.cavity.CavityBox: cavity-biased exchange) and the
    method name the verdict carries. ``model``: a slit; its lateral box is replaced by the hexagonal
    one (and, for the check, the hexagonal one of ``box_scale`` x the edge). ``eos``: the
    equation of state that gives the hot rungs' fugacities (default: the one named by
    ``state.eos``, or the Lennard-Jones EOS). Attempts double the production until the
    certificate holds or ``budget_cpu_s`` of process time is spent; the last attempt is
    returned."""
    from gcmc.physics.eos import make_eos

    cs = settings or CertifySettings()
    if eos is None:
        eos = make_eos(state.eos if state.eos not in ("none", "") else "lennard-jones", model.probe)
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    small = with_lateral_box(model, "hexagonal")
    big = with_lateral_box(model, "hexagonal", cs.box_scale)
    states = _hot_states(small, state, cs, eos)
    area_ratio = (big.box_lengths_nm[0] * big.box_lengths_nm[1]) / (
        small.box_lengths_nm[0] * small.box_lengths_nm[1]
    )
    # energy fluctuations grow as sqrt(N): more rungs keep the swap acceptance
    big_cs = replace(cs, hot_rungs=math.ceil(cs.hot_rungs * math.sqrt(area_ratio)))
    big_states = _hot_states(big, state, big_cs, eos)
    t_start = time.process_time()
    production = cs.production_moves
    attempt = 0
    while True:
        seeds = ss.spawn(len(PREPARATIONS) + 1)
        preps = [
            _prepare(name.split("-")[0], small, states, cs, production, sd, progress, box_class)
            for name, sd in zip(PREPARATIONS, seeds, strict=False)
        ]
        for p, name in zip(preps, PREPARATIONS, strict=True):
            p.name = name
        boxp = _prepare(
            "below", big, big_states, big_cs, production, seeds[-1], progress, box_class
        )
        boxp.name = "below, larger box"
        cert = judge_preparations(
            cs, preps, boxp, production, time.process_time() - t_start, method
        )
        attempt += 1
        spent = time.process_time() - t_start
        if cs.max_production_moves > 0:
            over = 2 * production > cs.max_production_moves
            detail = (
                f"{production} production moves per rung after {attempt} attempt(s), the next "
                f"(2 x production) would exceed the {cs.max_production_moves} move budget"
            )
        else:
            over = spent * 3.0 > cs.budget_cpu_s  # the next (doubled) would exceed it
            detail = (
                f"{spent:.0f} CPU s after {attempt} attempt(s), the next "
                f"(2 x production) would exceed the {cs.budget_cpu_s:.0f} s budget"
            )
        if cert.certified or over:
            if not cert.certified:
                cert.flags.append(fl.flag_text(fl.BUDGET_SPENT, detail=detail))
                cert.result.flags = list(cert.flags)
            return cert
        production *= 2


def attempt_moves(model: PoreModel, cs: CertifySettings, production: int) -> int:
    """Moves (all boxes) of one attempt of :func:`certify_filled_point` at ``production``
    moves per rung: the four preparations' chains in the hexagonal box (the annealed one's
    cooling path: one equilibration per rung), the larger box's chain with its extra rungs."""
    small = with_lateral_box(model, "hexagonal")
    big = with_lateral_box(model, "hexagonal", cs.box_scale)
    ratio = (big.box_lengths_nm[0] * big.box_lengths_nm[1]) / (
        small.box_lengths_nm[0] * small.box_lengths_nm[1]
    )
    rungs = cs.hot_rungs + 1
    big_rungs = math.ceil(cs.hot_rungs * math.sqrt(ratio)) + 1
    per_rung = cs.equilibration_moves + production
    return (
        len(PREPARATIONS) * rungs * per_rung + rungs * cs.equilibration_moves + big_rungs * per_rung
    )


def judge_preparations(
    cs: CertifySettings,
    preps: list[Preparation],
    boxp: Preparation,
    production: int,
    cpu_s: float,
    method: str = "certified-tempering",
) -> Certificate:
    """The certificate's verdict on given preparations (criteria 1-4 of the module
    docstring); any sampler's preparations can be judged (the benchmark judges the point-wise
    sampler's the same way). The pooled result's ``seconds`` is ``cpu_s`` (process time), its
    error the standard error of the preparations' mean, ``converged`` the verdict."""
    flags: list[str] = []
    dens = np.array([p.density_per_nm3 for p in preps])
    mean = float(dens.mean())
    spread = float((dens.max() - dens.min()) / mean) if mean > 0 else math.nan
    if not spread <= cs.tolerance:
        flags.append(
            fl.flag_text(
                fl.PREPARATIONS_DISAGREE,
                detail="densities "
                + ", ".join(f"{p.name} {p.density_per_nm3:.4g}" for p in preps)
                + f" /nm^3 spread {100 * spread:.2f} % > {100 * cs.tolerance:.2g} %",
            )
        )
    for p in preps + [boxp]:
        if not p.drift_passed:
            flags.append(fl.flag_text(fl.PREPARATION_DRIFT, p.name, f"z = {p.drift_z:.1f}"))
    k_min = required_renewals(preps + [boxp], cs.tolerance)
    for p in preps + [boxp]:
        if not p.renewals >= k_min:
            flags.append(
                fl.flag_text(
                    fl.FEW_RENEWALS,
                    p.name,
                    f"{p.renewals:.1f} (hot arrivals {p.renewals_hot}, exchanges "
                    f"{p.exchanges}) < {k_min}",
                )
            )
    box_diff = (boxp.density_per_nm3 - mean) / mean if mean > 0 else math.nan
    if not abs(box_diff) <= cs.tolerance:
        flags.append(
            fl.flag_text(
                fl.BOX_SIZE_DISAGREES,
                detail=f"{boxp.density_per_nm3:.4g} /nm^3 in {boxp.box_nm[0]:.3f} x "
                f"{boxp.box_nm[1]:.3f} nm vs {mean:.4g} ({100 * box_diff:+.2f} %)",
            )
        )
    certified = not flags
    r0 = preps[0].result
    result = replace(
        r0,
        molecules_mean=float(np.mean([p.molecules_mean for p in preps])),
        molecules_stderr=float(np.std([p.molecules_mean for p in preps], ddof=1) / 2.0),
        density_per_nm3=mean,
        density_per_nm3_stderr=float(np.std(dens, ddof=1) / math.sqrt(len(dens))),
        replica_means=[p.molecules_mean for p in preps],
        replica_stderrs=[p.molecules_stderr for p in preps],
        moves=int(sum(p.result.moves for p in preps) + boxp.result.moves),
        seconds=cpu_s,
        converged=certified,
        flags=list(flags),
        method=method,
    )
    from gcmc.physics.units import per_nm3_to_mmol_per_cm3

    result.excess_density_per_nm3 = mean - r0.bulk_density_per_nm3
    result.density_mmol_per_cm3 = per_nm3_to_mmol_per_cm3(mean)
    result.density_mmol_per_cm3_stderr = per_nm3_to_mmol_per_cm3(result.density_per_nm3_stderr)
    result.excess_density_mmol_per_cm3 = per_nm3_to_mmol_per_cm3(result.excess_density_per_nm3)
    return Certificate(
        certified=certified,
        method=method,
        density_per_nm3=mean,
        density_spread_rel=spread,
        box_difference_rel=float(box_diff),
        min_renewals=k_min,
        preparations=preps,
        box_check=boxp,
        flags=flags,
        cpu_s=cpu_s,
        production_moves=production,
        result=result,
    )


#: point methods by name, for the escalation of a build: each takes (model, state, seed,
#: settings, eos, progress) and returns a Certificate-like verdict with ``result``
POINT_METHODS: dict[str, Callable[..., Certificate]] = {
    "certified-tempering": certify_filled_point,
}
