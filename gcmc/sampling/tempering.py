"""Hyper-parallel tempering: replica exchange in temperature and chemical potential
(Yan & de Pablo, J. Chem. Phys. 111 (1999) 9509).

A chain of grand canonical ensembles k = 0..K-1, each at its own temperature T_k and activity
z_k (z = beta f, the fugacity over kT), shares one pore model. Typically the chain is the
width's pressure ladder at the kernel temperature followed by a few hotter states, so that a
filled pore whose packing is frozen at the kernel temperature melts in the hot rungs and
re-forms on the way down: the chemical-potential-only ladder (:mod:`gcmc.sampling.ladder`)
cannot do that, since its neighbours in pressure are equally frozen.

Swap acceptance. Over configurations x (N molecules, energy U(x) in K: pairs within r_c,
tails and walls) the grand canonical weight of ensemble k is

    P_k(x) = z_k^N exp(-U(x)/T_k) / (N! Xi_k),

(the kinetic factor is inside z_k; configurations carry no momenta). Exchanging the
configurations x_i, x_j of two ensembles of the chain changes the product weight by

    P_i(x_j) P_j(x_i) / (P_i(x_i) P_j(x_j))
        = (z_i / z_j)^(N_j - N_i) exp[(1/T_i - 1/T_j)(U_i - U_j)],

since the N! and the partition functions cancel (V is common). The move is its own reverse,
so the Metropolis rule min(1, that ratio) satisfies detailed balance in the product ensemble
and each ensemble keeps its own grand canonical marginal. At equal temperatures it is the
ladder's rule (z_i/z_j)^(N_j - N_i); at equal activities and fixed N it is the canonical
parallel-tempering rule exp[(beta_i - beta_j)(U_i - U_j)].

Implementation: boxes change places on the chain, as in the ladder. A box taking a rung takes
its temperature (beta and the overlap distance of the engine), activity, insertion bias and
step size; energies are configuration properties and travel with the box. The boxes are built
at the hottest temperature of the chain, whose overlap distance is the smallest, so that the
cell capacity bound holds at every rung. Samples are filed per rung. Swap decisions draw from
their own numpy Generator derived from the seed: results are a function of the seed only.

Renewal bookkeeping. A box that reached the hottest rung of the chain and then came back to a
rung has brought that rung a configuration that was molten and re-formed in between; the
number of such arrivals during production (``renewals``) plus the accepted insertions and
deletions per molecule is how often a rung's content was renewed (gcmc.sampling.certificate).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from gcmc.physics.henry import pore_limit
from gcmc.physics.model import SLIT, PoreModel
from gcmc.physics.potentials import overlap_distance_nm
from gcmc.sampling import engine as E
from gcmc.sampling import statistics as st
from gcmc.sampling.box import Box, EngineOptions
from gcmc.sampling.point import (
    PointOutcome,
    SamplingSettings,
    ThermoState,
    _analyse,
    _blocked_result,
    _ReplicaRun,
)
from gcmc.sampling.rng import seed_state

#: default length of a round (moves per box between swap attempts), in units of sample_every
ROUND_SAMPLES = 10


def swap_acceptance(
    t_i: float, t_j: float, z_i: float, z_j: float, n_i: int, n_j: int, u_i: float, u_j: float
) -> float:
    """min(1, (z_i/z_j)^(N_j - N_i) exp[(1/T_i - 1/T_j)(U_i - U_j)]): exchange of the
    configurations of two grand canonical ensembles (T_i, z_i) and (T_j, z_j) of the same
    volume; U in K (derivation in the module docstring)."""
    log_a = 0.0
    if n_j != n_i:
        log_a += (n_j - n_i) * (math.log(z_i) - math.log(z_j))
    if t_i != t_j:
        log_a += (1.0 / t_i - 1.0 / t_j) * (u_i - u_j)
    if log_a >= 0.0:
        return 1.0
    return math.exp(log_a)


@dataclass
class TemperingOutcome:
    """Point outcomes per rung (in the chain's order) and the swap statistics per neighbour
    pair (pair k is rungs k and k+1).

    ``renewals[k]``: production arrivals at rung k of a box that visited the hottest rung since
    it was last at rung k; ``exchanges[k]``: accepted insertions + deletions at rung k during
    production."""

    points: list[PointOutcome]
    swap_attempts: np.ndarray
    swap_accepts: np.ndarray
    renewals: np.ndarray
    exchanges: np.ndarray
    seconds: float
    temperatures_K: list[float] = field(default_factory=list)

    @property
    def swap_acceptance(self) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(
                self.swap_attempts > 0,
                self.swap_accepts / np.maximum(self.swap_attempts, 1),
                np.nan,
            )

    def content_renewals(self, k: int) -> float:
        """How often rung k's content was renewed in production: hot arrivals plus accepted
        exchanges per molecule."""
        n = self.points[k].result.molecules_mean
        per = self.exchanges[k] / n if n > 0 else math.inf
        return float(self.renewals[k] + per)


class _Rung:
    def __init__(
        self, state: ThermoState, k_trials: int, dmax: float, capacity: int, n_bins: int
    ) -> None:
        self.t = state.temperature_K
        self.z = state.activity_nm3
        self.k_trials = k_trials
        self.dmax = dmax
        self.n = np.zeros(capacity, dtype=np.int64)
        self.uff = np.zeros(capacity)
        self.usf = np.zeros(capacity)
        self.profile = np.zeros(n_bins)
        self.written = 0
        self.moves = 0
        self.seconds = 0.0
        self.counters = np.zeros(E.N_COUNTERS, dtype=np.int64)
        self.prod_counters = np.zeros(E.N_COUNTERS, dtype=np.int64)

    def take(self, box: Box, rov2: float) -> None:
        box.temperature_k = self.t
        box.fp[E.F_BETA] = 1.0 / self.t
        box.fp[E.F_ROV2] = rov2
        box.activity_nm3 = self.z
        box.set_insertion_trials(self.k_trials)
        box.max_displacement_nm = self.dmax

    def acceptance(self, counters: np.ndarray) -> dict[str, float]:
        c = counters

        def ratio(a: int, b: int) -> float:
            return float(c[a] / c[b]) if c[b] else float("nan")

        return {
            "displacement": ratio(E.C_DISP_ACC, E.C_DISP_TRY),
            "insertion": ratio(E.C_INS_ACC, E.C_INS_TRY),
            "deletion": ratio(E.C_DEL_ACC, E.C_DEL_TRY),
        }


class _Chain:
    def __init__(
        self,
        model: PoreModel,
        states: list[ThermoState],
        settings: SamplingSettings,
        seed: np.random.SeedSequence,
        starts: list[np.ndarray | None],
        max_disp: float | None,
        round_moves: int,
        capacity: int,
        swap_rule: Callable[..., float],
        box_class: type[Box] = Box,
    ) -> None:
        self.settings = settings
        self.round_moves = round_moves
        self.swap_rule = swap_rule
        seeds = seed.spawn(len(states) + 1)
        self.swap_rng = np.random.default_rng(seeds[-1])
        options = EngineOptions(
            cells_per_cutoff=settings.cells_per_cutoff,
            insertion_trials=max(1, settings.insertion_trials),
            displacement_fraction=settings.displacement_fraction,
            slab_tail=settings.slab_tail,
        )
        t_hot = max(s.temperature_K for s in states)
        self.hot = max(range(len(states)), key=lambda k: (states[k].temperature_K, k))
        eps, sig = model.probe.epsilon_k, model.probe.sigma_nm
        self.rov2 = [overlap_distance_nm(eps, sig, s.temperature_K) ** 2 for s in states]
        self.boxes: list[Box] = []
        self.rungs: list[_Rung] = []
        for k, s in enumerate(states):
            # built at the hottest T: the smallest overlap distance, the largest cell capacity
            box = box_class(
                model,
                t_hot,
                s.activity_nm3,
                options,
                rng_state=seed_state(seeds[k]),
                max_displacement_nm=max_disp,
            )
            rung = _Rung(s, int(box.ip[E.I_KTRIALS]), box.max_displacement_nm, capacity, box.n_bins)
            rung.take(box, self.rov2[k])
            if starts[k] is not None and len(starts[k]):
                box.load_positions(starts[k])
            self.boxes.append(box)
            self.rungs.append(rung)
        n_pairs = max(len(states) - 1, 0)
        self.attempts = np.zeros(n_pairs, dtype=np.int64)
        self.accepts = np.zeros(n_pairs, dtype=np.int64)
        # renewal bookkeeping per box: the set of rungs visited since it was last hot
        self.fresh = [set() for _ in self.boxes]  # rungs that this box has not renewed yet
        self.renewals = np.zeros(len(states), dtype=np.int64)
        self.round = 0
        self.sampling = False

    def energy(self, k: int) -> float:
        e = self.boxes[k].energy
        return float(e[0] + e[1])

    def run_round(self, z_scale: float = 1.0) -> None:
        every = self.settings.sample_every if self.sampling else 0
        for k, box in enumerate(self.boxes):
            rung = self.rungs[k]
            rung.take(box, self.rov2[k])
            if z_scale != 1.0:
                box.activity_nm3 = rung.z * z_scale
            before = box.counters.copy()
            t = time.perf_counter()
            if every:
                rung.written += box.run(
                    self.round_moves, every, rung.n, rung.uff, rung.usf, rung.written, rung.profile
                )
            else:
                box.run(self.round_moves)
            rung.seconds += time.perf_counter() - t
            rung.moves += self.round_moves
            d = box.counters - before
            rung.counters += d
            if self.sampling:
                rung.prod_counters += d
        self._swaps()

    def _swaps(self) -> None:
        first = self.round % 2
        self.round += 1
        for i in range(first, len(self.boxes) - 1, 2):
            j = i + 1
            ri, rj = self.rungs[i], self.rungs[j]
            a = self.swap_rule(
                ri.t,
                rj.t,
                ri.z,
                rj.z,
                self.boxes[i].n_molecules,
                self.boxes[j].n_molecules,
                self.energy(i),
                self.energy(j),
            )
            self.attempts[i] += 1
            u = self.swap_rng.random()
            if a >= 1.0 or u < a:
                self.accepts[i] += 1
                self.boxes[i], self.boxes[j] = self.boxes[j], self.boxes[i]
                self.fresh[i], self.fresh[j] = self.fresh[j], self.fresh[i]
                for k in (i, j):
                    self._arrive(k)

    def _arrive(self, k: int) -> None:
        """Box now at rung k: at the hottest rung it is molten (every other rung may count it
        as a renewal once); elsewhere it counts for rung k if rung k has not seen it since."""
        if k == self.hot:
            self.fresh[k] = set(range(len(self.boxes))) - {k}
            return
        if k in self.fresh[k]:
            self.fresh[k].discard(k)
            if self.sampling:
                self.renewals[k] += 1

    def adapt(self, allow_bias: bool) -> None:
        s = self.settings
        for k, rung in enumerate(self.rungs):
            box = self.boxes[k]
            acc = rung.acceptance(rung.counters)
            a = acc["displacement"]
            sig = box.model.probe.sigma_nm
            lmax = 0.5 * min(box.model.box_lengths_nm[:2])
            if math.isfinite(a):
                rung.dmax = float(np.clip(rung.dmax * np.clip(a / 0.4, 0.5, 1.5), 0.01 * sig, lmax))
            if allow_bias and s.insertion_trials == 0 and rung.k_trials == 1:
                ins = acc["insertion"]
                if math.isfinite(ins) and ins < s.bias_threshold and box.n_molecules > 0:
                    rung.k_trials = s.biased_trials
            rung.counters[:] = 0

    def rounds_for(self, moves: int) -> int:
        return max(1, math.ceil(moves / self.round_moves))

    def equilibrate(self, moves: int, z_scale: float = 1.0) -> None:
        if moves <= 0:
            return
        n_rounds = self.rounds_for(moves)
        per_adapt = max(1, n_rounds // 20)
        for r in range(n_rounds):
            self.run_round(z_scale)
            if (r + 1) % per_adapt == 0:
                self.adapt(allow_bias=(z_scale == 1.0 and r >= n_rounds // 2))

    def produce(self, progress: Callable[[int], None] | None) -> None:
        self.sampling = True
        for rung in self.rungs:
            rung.counters[:] = 0
            rung.prod_counters[:] = 0
            rung.moves = 0
        n_rounds = min(
            self.rounds_for(self.settings.production_moves),
            len(self.rungs[0].n) * self.settings.sample_every // self.round_moves,
        )
        for _ in range(n_rounds):
            self.run_round()
            if progress:
                progress(self.round_moves * len(self.boxes))

    def replica_runs(self) -> list[_ReplicaRun]:
        runs = []
        for k, rung in enumerate(self.rungs):
            box = self.boxes[k]
            rung.take(box, self.rov2[k])
            n = rung.n[: rung.written]
            t0 = 0
            if len(n) >= 40 and np.ptp(n) > 0:
                t0, _, _ = st.detect_equilibration(n.astype(float))
            c = rung.prod_counters
            runs.append(
                _ReplicaRun(
                    n=n[t0:],
                    uff=rung.uff[: rung.written][t0:],
                    usf=rung.usf[: rung.written][t0:],
                    profile=rung.profile / max(rung.written, 1),
                    box=box,
                    moves=rung.moves,
                    seconds=rung.seconds,
                    t0=t0,
                    k_trials=rung.k_trials,
                    acceptance=rung.acceptance(c),
                    # swaps renew a rung's content too: the point-wise few_exchanges test does
                    # not apply as it stands (the certificate counts both, see
                    # TemperingOutcome.content_renewals)
                    exchanges=-1,
                )
            )
        return runs

    def exchanges(self) -> np.ndarray:
        return np.array(
            [int(r.prod_counters[E.C_INS_ACC] + r.prod_counters[E.C_DEL_ACC]) for r in self.rungs],
            dtype=np.int64,
        )


def simulate_tempering(
    model: PoreModel,
    states: list[ThermoState],
    settings: SamplingSettings,
    seed: np.random.SeedSequence | int,
    starts: list[np.ndarray | None] | None = None,
    max_displacement_nm: float | None = None,
    round_moves: int | None = None,
    overfill: bool = False,
    progress: Callable[[int], None] | None = None,
    swap_rule: Callable[..., float] | None = None,
    box_class: type[Box] = Box,
) -> TemperingOutcome:
    """Simulate a chain of (T, z) states with swaps between chain neighbours.

    One chain (``settings.replicas`` is not used: independent preparations are separate calls,
    see gcmc.sampling.certificate). ``starts[k]``: an initial configuration of rung k (None:
    empty). ``overfill``: before equilibration, half an equilibration at
    ``settings.overfill_factor`` x each rung's activity. Production runs
    ``settings.production_moves`` moves per rung. ``swap_rule`` replaces
    :func:`swap_acceptance` (tests only). ``box_class``: the Box type of every rung (a
    subclass with other moves and the same constructor and ``run``, e.g.
    gcmc.sampling.cavity.CavityBox). Records come back per rung, in the order given.
    """
    from gcmc.errors import InputError

    if len(states) < 1:
        raise InputError("tempering: at least one state is needed")
    n_pairs = len(states) - 1
    if model.geometry == SLIT and pore_limit(model, min(s.temperature_K for s in states)).blocked:
        z = np.zeros(n_pairs, dtype=np.int64)
        return TemperingOutcome(
            points=[_blocked_result(model, s) for s in states],
            swap_attempts=z,
            swap_accepts=z.copy(),
            renewals=np.zeros(len(states), dtype=np.int64),
            exchanges=np.zeros(len(states), dtype=np.int64),
            seconds=0.0,
            temperatures_K=[s.temperature_K for s in states],
        )
    every = settings.sample_every
    m = round_moves if round_moves is not None else ROUND_SAMPLES * every
    if m <= 0 or m % every:
        raise InputError(
            f"tempering: round_moves ({m}) must be a positive multiple of "
            f"sampling.sample_every ({every})"
        )
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    capacity = math.ceil(settings.production_moves / m) * (m // every)
    starts_ = starts if starts is not None else [None] * len(states)
    t_start = time.perf_counter()
    chain = _Chain(
        model,
        states,
        settings,
        ss,
        list(starts_),
        max_displacement_nm,
        m,
        capacity,
        swap_rule or swap_acceptance,
        box_class,
    )
    eq = settings.equilibration_moves
    if overfill:
        chain.equilibrate(eq // 2, z_scale=settings.overfill_factor)
    chain.equilibrate(eq)
    chain.produce(progress)
    runs = chain.replica_runs()
    one = SamplingSettings(**{**settings.__dict__, "replicas": 1})
    points = []
    for k, state in enumerate(states):
        out = _analyse(model, state, one, [runs[k]])
        out.result.moves += eq + (eq // 2 if overfill else 0)
        out.result.method = "tempering"
        below = chain.accepts[k - 1] / chain.attempts[k - 1] if k > 0 else math.nan
        above = chain.accepts[k] / chain.attempts[k] if k < n_pairs else math.nan
        out.result.acceptance["swap_lower"] = float(below)
        out.result.acceptance["swap_upper"] = float(above)
        points.append(out)
    return TemperingOutcome(
        points=points,
        swap_attempts=chain.attempts,
        swap_accepts=chain.accepts,
        renewals=chain.renewals,
        exchanges=chain.exchanges(),
        seconds=time.perf_counter() - t_start,
        temperatures_K=[s.temperature_K for s in states],
    )


# --- the chain of a dense point -----------------------------------------------------------


def hot_chain_temperatures(t0: float, t_hot: float, hot_rungs: int) -> list[float]:
    """Geometric temperatures T_0 < T_1 < ... < T_K = t_hot (K = hot_rungs): equal steps in
    ln T give roughly equal swap acceptance when the heat capacity varies slowly."""
    if hot_rungs < 1 or not t_hot > t0:
        return [t0]
    r = (t_hot / t0) ** (1.0 / hot_rungs)
    return [t0 * r**k for k in range(hot_rungs + 1)]


# --- registry of ladder methods -------------------------------------------------------------


@dataclass(frozen=True)
class LadderMethod:
    """A named way to sample several coupled states of one width."""

    name: str
    description: str
    run: Callable[..., object]
    reference: str


def _ladder_exchange(*args: object, **kwargs: object) -> object:
    from gcmc.sampling.ladder import simulate_ladder

    return simulate_ladder(*args, **kwargs)  # type: ignore[arg-type]


LADDER_METHODS: dict[str, LadderMethod] = {
    "exchange": LadderMethod(
        "exchange",
        "replica exchange in the chemical potential along the width's pressure ladder",
        _ladder_exchange,
        "Yan & de Pablo, J. Chem. Phys. 111 (1999) 9509 (mu direction only)",
    ),
    "tempering": LadderMethod(
        "tempering",
        "hyper-parallel tempering: swaps in temperature and chemical potential along a chain "
        "of (T, z) states",
        simulate_tempering,
        "Yan & de Pablo, J. Chem. Phys. 111 (1999) 9509",
    ),
}


def ladder_method(name: str) -> LadderMethod:
    """The registered ladder method ``name`` (an InputError naming the choices otherwise)."""
    from gcmc.errors import InputError

    if name not in LADDER_METHODS:
        raise InputError(
            f"ladder method {name!r}: unknown; choose one of {', '.join(sorted(LADDER_METHODS))}"
        )
    return LADDER_METHODS[name]
