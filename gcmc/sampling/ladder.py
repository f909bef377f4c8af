"""Replica exchange along a pressure ladder: parallel tempering in the chemical potential
(Yan & de Pablo, J. Chem. Phys. 111 (1999) 9509).

One Box per pressure of a width's ladder (same T, same pore, activities z_0 < z_1 < ...). The
boxes run in rounds of M moves each; after every round, swaps of configurations between
neighbouring activities are attempted, on the even pairs (0,1), (2,3), ... after even rounds
and on the odd pairs (1,2), (3,4), ... after odd rounds.

Swap acceptance. In the grand canonical ensemble at activity z (z = beta f, the kinetic factor
cancels: the activity absorbs
the thermal wavelength) and volume V, a configuration x of N molecules has the weight

    P_z(x) = z^N exp(-beta U(x)) / (N! Xi(z)).

The ladder samples the product ensemble prod_k P_{z_k}(x_k). Exchanging the configurations
x_i (N_i molecules) and x_j (N_j molecules) of the ensembles at z_i and z_j changes the product
weight by

    P_{z_i}(x_j) P_{z_j}(x_i) / (P_{z_i}(x_i) P_{z_j}(x_j))
        = z_i^{N_j} z_j^{N_i} / (z_i^{N_i} z_j^{N_j}) = (z_i / z_j)^(N_j - N_i):

the Boltzmann factors, the N! and the grand partition functions cancel because T and V are
the same in both ensembles. The swap is symmetric (it is its own reverse), so the Metropolis
rule min(1, (z_i/z_j)^(N_j - N_i)) satisfies detailed balance in the product ensemble, and the
marginal distribution of each ensemble is still its own grand canonical one.

Implementation: configurations stay in their Box objects and the boxes change places on the
ladder (a box takes over the activity, insertion bias and step size of its new rung); energies
are configuration properties and travel with the box. Samples are filed per rung, so each
rung's series (N, U_ff, U_sf) is a grand canonical series at that rung's activity.
The swap decisions draw from their own numpy Generator derived from the task seed, and each
box has its own engine stream: the results are a function of the seed only.

The point records come from :func:`gcmc.sampling.point._analyse` (one implementation of the
analysis):
with ``settings.replicas = 2`` the whole ladder runs twice, the second time from over-filled
states, and the two ladders are each rung's two replicas (the agreement test of the sampler).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from gcmc.physics.henry import pore_limit
from gcmc.physics.model import SLIT, PoreModel
from gcmc.sampling import statistics as st
from gcmc.sampling.box import (
    Box,
    EngineOptions,
    acceptance_ratios,
    insertion_counts_of,
    new_counters,
)
from gcmc.sampling.point import (
    CHUNKS,
    MIN_SAMPLES_DRIFT,
    MIN_SAMPLES_TARGET,
    PointOutcome,
    SamplingSettings,
    ThermoState,
    _analyse,
    _blocked_result,
    _ReplicaRun,
    adapted_step,
    precise_enough,
    shared_insertion_trials,
)
from gcmc.sampling.rng import seed_state

#: default length of a round (moves per box between swap attempts), in units of sample_every
ROUND_SAMPLES = 10


def swap_acceptance(z_i: float, z_j: float, n_i: int, n_j: int) -> float:
    """min(1, (z_i/z_j)^(N_j - N_i)): exchange of configurations between two grand canonical
    ensembles at the same T and V (derivation in the module docstring)."""
    d = n_j - n_i
    if d == 0:
        return 1.0
    log_a = d * (math.log(z_i) - math.log(z_j))
    return 1.0 if log_a >= 0.0 else math.exp(log_a)


@dataclass
class LadderOutcome:
    """Point outcomes per rung (ascending activity) and the swap statistics per neighbour pair
    (pair k is rungs k and k+1), summed over the ladder's replicas."""

    points: list[PointOutcome]
    swap_attempts: np.ndarray
    swap_accepts: np.ndarray
    seconds: float

    @property
    def swap_acceptance(self) -> np.ndarray:
        """Accepted fraction of swaps per neighbouring pair (NaN where none was tried)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(
                self.swap_attempts > 0,
                self.swap_accepts / np.maximum(self.swap_attempts, 1),
                np.nan,
            )


class _Rung:
    """What belongs to a pressure of the ladder, whichever box holds it."""

    def __init__(self, z: float, k_trials: int, dmax: float, n_samples: int, n_bins: int):
        self.z = z
        self.k_trials = k_trials
        self.dmax = dmax
        self.n = np.zeros(n_samples, dtype=np.int64)
        self.uff = np.zeros(n_samples)
        self.usf = np.zeros(n_samples)
        self.profile = np.zeros(n_bins)
        self.written = 0
        self.moves = 0
        self.seconds = 0.0
        self.counters = new_counters()
        # insertion attempts / acceptances in the measurement window of the shared
        # insertion-method rule (second half of the first equilibration half)
        self.ins_tries = 0
        self.ins_accepts = 0

    def take(self, box: Box) -> None:
        box.activity_nm3 = self.z
        box.set_insertion_trials(self.k_trials)
        box.max_displacement_nm = self.dmax

    def acceptance(self) -> dict[str, float]:
        return acceptance_ratios(self.counters)


class _Ladder:
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
    ):
        self.settings = settings
        self.volume = model.pore_volume_nm3
        self.round_moves = round_moves
        box_seeds = seed.spawn(len(states) + 1)
        self.swap_rng = np.random.default_rng(box_seeds[-1])
        options = EngineOptions(
            cells_per_cutoff=settings.cells_per_cutoff,
            insertion_trials=max(1, settings.insertion_trials),
            displacement_fraction=settings.displacement_fraction,
            slab_tail=settings.slab_tail,
        )
        self.boxes: list[Box] = []
        self.rungs: list[_Rung] = []
        for k, s in enumerate(states):
            box = Box(
                model,
                s.temperature_K,
                s.activity_nm3,
                options,
                rng_state=seed_state(box_seeds[k]),
                max_displacement_nm=max_disp,
            )
            if starts[k] is not None and len(starts[k]):
                box.load_positions(starts[k])
            self.boxes.append(box)
            self.rungs.append(
                _Rung(
                    s.activity_nm3,
                    box.insertion_trials,
                    box.max_displacement_nm,
                    capacity,
                    box.n_bins,
                )
            )
        n_pairs = max(len(states) - 1, 0)
        self.attempts = np.zeros(n_pairs, dtype=np.int64)
        self.accepts = np.zeros(n_pairs, dtype=np.int64)
        self.round = 0
        self.sampling = False

    def run_round(self, z_scale: float = 1.0) -> None:
        every = self.settings.sample_every if self.sampling else 0
        for k, box in enumerate(self.boxes):
            rung = self.rungs[k]
            rung.take(box)
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
            rung.counters += box.counters - before
        self._swaps()

    def _swaps(self) -> None:
        first = self.round % 2
        self.round += 1
        for i in range(first, len(self.boxes) - 1, 2):
            j = i + 1
            a = swap_acceptance(
                self.rungs[i].z,
                self.rungs[j].z,
                self.boxes[i].n_molecules,
                self.boxes[j].n_molecules,
            )
            self.attempts[i] += 1
            u = self.swap_rng.random()
            if a >= 1.0 or u < a:
                self.accepts[i] += 1
                self.boxes[i], self.boxes[j] = self.boxes[j], self.boxes[i]

    def adapt(self, measure: bool) -> None:
        """Step-size adaptation from the last rounds' counters, per rung; equilibration only.
        ``measure``: add the rounds' insertion counts to the rung's measurement window (the
        insertion method is decided per rung for all replicas alike, see simulate_ladder)."""
        for k, rung in enumerate(self.rungs):
            box = self.boxes[k]
            acc = rung.acceptance()
            a = acc["displacement"]
            sig = box.model.probe.sigma_nm
            lmax = 0.5 * min(box.model.box_lengths_nm)
            if math.isfinite(a):
                rung.dmax = adapted_step(rung.dmax, a, sig, lmax)
            if measure:
                n_try, n_acc = insertion_counts_of(rung.counters)
                rung.ins_tries += n_try
                rung.ins_accepts += n_acc
            rung.counters[:] = 0

    def rounds_for(self, moves: int) -> int:
        return max(1, math.ceil(moves / self.round_moves))

    def equilibrate(
        self,
        moves: int,
        z_scale: float = 1.0,
        measure: bool = False,
        start: int = 0,
        stop: int | None = None,
    ) -> None:
        """Rounds ``start`` to ``stop`` (default: all) of an equilibration of ``moves`` moves
        per box, with swaps and step-size adaptation (a run split at an adaptation boundary
        makes the same moves as an unsplit one); ``measure``: count the insertions of the
        rounds from the middle of 0 to ``stop`` on, per rung."""
        if moves <= 0:
            return
        n_rounds = self.rounds_for(moves)
        stop = n_rounds if stop is None else min(stop, n_rounds)
        per_adapt = self.rounds_per_adapt(moves)
        for r in range(start, stop):
            self.run_round(z_scale)
            if (r + 1) % per_adapt == 0:
                self.adapt(measure=(measure and z_scale == 1.0 and r >= stop // 2))

    def rounds_per_adapt(self, moves: int) -> int:
        return max(1, self.rounds_for(moves) // CHUNKS)

    def half_round(self, moves: int) -> int:
        """The first adaptation boundary at or past the middle of an equilibration."""
        n_rounds = self.rounds_for(moves)
        per = self.rounds_per_adapt(moves)
        return min(n_rounds, -(-(n_rounds // 2) // per) * per)

    def produce(self) -> None:
        s = self.settings
        self.sampling = True
        for rung in self.rungs:
            rung.counters[:] = 0
            rung.moves = 0
        total = s.production_capacity
        n_rounds = min(
            self.rounds_for(total), len(self.rungs[0].n) * s.sample_every // self.round_moves
        )
        min_rounds = self.rounds_for(s.production_moves)
        check_every = max(1, min_rounds // CHUNKS)
        for r in range(n_rounds):
            self.run_round()
            if s.extends and r + 1 >= min_rounds and (r + 1) % check_every == 0:
                if all(_target_met(rung, s, self.volume) for rung in self.rungs):
                    break

    def replica_runs(self) -> list[_ReplicaRun]:
        # start_n and exchanges stay unset (-1): swaps between rungs renew a rung's content
        # too, so the point-wise sampler's not_bracketed and few_exchanges tests do not apply
        # as they stand (the drift, agreement and error tests do)
        runs = []
        for k, rung in enumerate(self.rungs):
            box = self.boxes[k]
            rung.take(box)
            n = rung.n[: rung.written]
            uff = rung.uff[: rung.written]
            usf = rung.usf[: rung.written]
            t0 = 0
            if len(n) >= MIN_SAMPLES_DRIFT and np.ptp(n) > 0:
                t0, _, _ = st.detect_equilibration(n.astype(float))
            acc = rung.acceptance()
            runs.append(
                _ReplicaRun(
                    n=n[t0:],
                    uff=uff[t0:],
                    usf=usf[t0:],
                    profile=rung.profile / max(rung.written, 1),
                    box=box,
                    moves=rung.moves,
                    seconds=rung.seconds,
                    t0=t0,
                    k_trials=rung.k_trials,
                    acceptance=acc,
                )
            )
        return runs


def _target_met(rung: _Rung, settings: SamplingSettings, volume: float) -> bool:
    if rung.written < MIN_SAMPLES_TARGET:
        return False
    x = rung.n[: rung.written].astype(float)
    est = st.block_average(x)
    if not (
        est.reliable and est.mean > 0 and precise_enough(est.stderr, est.mean, settings, volume)
    ):
        return est.mean == 0.0 and np.ptp(x) == 0  # an empty rung has nothing to converge
    return st.drift_test(x).passed


def simulate_ladder(
    model: PoreModel,
    states: list[ThermoState],
    settings: SamplingSettings,
    seed: np.random.SeedSequence | int,
    starts: list[np.ndarray | None] | None = None,
    max_displacement_nm: float | None = None,
    round_moves: int | None = None,
) -> LadderOutcome:
    """Simulate all pressures of one (temperature, width) with replica exchange between
    neighbouring activities. ``states`` must share T; they are simulated in ascending
    activity and the outcomes are returned in the order given. ``starts[k]`` is an initial
    configuration for rung k (None: empty). ``round_moves``: moves per box between swap
    attempts (default ROUND_SAMPLES x sample_every; a multiple of sample_every)."""
    from gcmc.errors import InputError

    if not states:
        return LadderOutcome(
            points=[],
            swap_attempts=np.zeros(0, dtype=np.int64),
            swap_accepts=np.zeros(0, dtype=np.int64),
            seconds=0.0,
        )
    temps = {s.temperature_K for s in states}
    if len(temps) != 1:
        raise InputError(
            "ladder: all states of a replica-exchange ladder need the same temperature"
        )
    if model.geometry == SLIT and pore_limit(model, states[0].temperature_K).blocked:
        n_pairs = len(states) - 1
        return LadderOutcome(
            points=[_blocked_result(model, s) for s in states],
            swap_attempts=np.zeros(n_pairs, dtype=np.int64),
            swap_accepts=np.zeros(n_pairs, dtype=np.int64),
            seconds=0.0,
        )
    every = settings.sample_every
    m = round_moves if round_moves is not None else ROUND_SAMPLES * every
    if m <= 0 or m % every:
        raise InputError(
            f"ladder: round_moves ({m}) must be a positive multiple of "
            f"sampling.sample_every ({every})"
        )
    order = sorted(range(len(states)), key=lambda k: (states[k].activity_nm3, k))
    sorted_states = [states[k] for k in order]
    sorted_starts = [None if starts is None else starts[k] for k in order]
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    total = settings.production_capacity
    capacity = math.ceil(total / m) * (m // every)
    ladders = []
    t_start = time.perf_counter()
    eq = settings.equilibration_moves
    first = 0
    for r, stream in enumerate(ss.spawn(settings.replicas)):
        lad = _Ladder(
            model, sorted_states, settings, stream, sorted_starts, max_displacement_nm, m, capacity
        )
        if r == 1:
            lad.equilibrate(eq // 2, z_scale=settings.overfill_factor)
        first = lad.half_round(eq)
        lad.equilibrate(eq, measure=True, stop=first)
        ladders.append(lad)
    # one insertion method per rung for every replica of it (the point sampler's rule)
    for k in range(len(sorted_states)):
        k_trials = shared_insertion_trials(
            settings,
            [lad.rungs[k].ins_tries for lad in ladders],
            [lad.rungs[k].ins_accepts for lad in ladders],
            [lad.boxes[k].n_molecules > 0 for lad in ladders],
        )
        for lad in ladders:
            lad.rungs[k].k_trials = k_trials
    for lad in ladders:
        lad.equilibrate(eq, start=first)
        lad.produce()
    runs = [lad.replica_runs() for lad in ladders]
    attempts = sum(lad.attempts for lad in ladders)
    accepts = sum(lad.accepts for lad in ladders)
    eq_moves = settings.equilibration_moves
    points_sorted = []
    n_p = len(sorted_states)
    for k, state in enumerate(sorted_states):
        out = _analyse(model, state, settings, [rr[k] for rr in runs])
        # _analyse counts production moves only for these runs: add the equilibration rounds
        out.result.moves += sum(
            eq_moves + (eq_moves // 2 if i == 1 else 0) for i in range(len(ladders))
        )
        below = accepts[k - 1] / attempts[k - 1] if k > 0 and attempts[k - 1] else math.nan
        above = accepts[k] / attempts[k] if k < n_p - 1 and attempts[k] else math.nan
        out.result.acceptance["swap_lower"] = float(below)
        out.result.acceptance["swap_upper"] = float(above)
        out.result.method = "exchange"
        points_sorted.append(out)
    points: list[PointOutcome | None] = [None] * n_p
    for pos, k in enumerate(order):
        points[k] = points_sorted[pos]
    return LadderOutcome(
        points=[p for p in points if p is not None],
        swap_attempts=attempts,
        swap_accepts=accepts,
        seconds=time.perf_counter() - t_start,
    )
