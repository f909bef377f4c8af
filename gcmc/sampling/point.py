"""One state point: equilibrate, produce, analyse. A pure function of (model, state, sampling
settings, seed) returning a result record, cheap to call many times in one process.

Convergence is not judged by block errors alone: a point can run as two replicas started from
different sides (from the given start, usually the previous lower-pressure state, and from an
over-filled state), each with a drift test (first half against second half); the point is
flagged when they disagree beyond their errors.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from gcmc.kernel import flags as fl
from gcmc.physics.henry import pore_limit
from gcmc.physics.model import SLIT, PoreModel
from gcmc.physics.units import activity_per_nm3, kelvin_to_kj_per_mol, per_nm3_to_mmol_per_cm3
from gcmc.sampling import statistics as st
from gcmc.sampling.box import Box, EngineOptions, insertion_counts_of
from gcmc.sampling.rng import seed_state


@dataclass(frozen=True)
class ThermoState:
    """The bulk reservoir a point is in equilibrium with."""

    temperature_K: float
    fugacity_Pa: float
    pressure_Pa: float = float("nan")
    bulk_density_per_nm3: float = float("nan")
    residual_enthalpy_K: float = 0.0
    eos: str = "none"

    @property
    def activity_nm3(self) -> float:
        """Activity z = f/kT (nm^-3)."""
        return activity_per_nm3(self.fugacity_Pa, self.temperature_K)


#: where a point's second replica may start (SamplingSettings.second_replica)
SECOND_REPLICA_STARTS = ("over-filled", "branch")


@dataclass(frozen=True)
class SamplingSettings:
    """How hard to sample one point."""

    equilibration_moves: int = 200_000
    production_moves: int = 1_000_000
    sample_every: int = 100
    #: k trial positions per insertion; 0 = automatic (plain insertion, switched to biased
    #: insertion with ``biased_trials`` when plain insertion is accepted less than
    #: ``bias_threshold`` per attempt during equilibration).
    insertion_trials: int = 0
    #: defaults from benchmarks/bench_sampling.py (benchmarks/README.md, "Sampling efficiency"):
    #: k = 64 converged fastest wherever biased insertion converged; k = 256 cost 3-4x more
    #: per move for no gain; plain insertion below ~3 % acceptance was slower or failed.
    biased_trials: int = 64
    bias_threshold: float = 3.0e-2
    displacement_fraction: float = 0.5
    #: independent replicas per point; the second starts over-filled, so that a point stuck
    #: in one packing is caught by the replicas' disagreement (benchmarks/README.md,
    #: "Sampling efficiency"): block errors alone read small while the mean is still wrong.
    replicas: int = 2
    #: the over-filled start: half an equilibration at this multiple of the activity; a point
    #: whose second replica started below the first one's mean (by more than agreement_rel)
    #: is flagged not_bracketed
    overfill_factor: float = 20.0
    #: where the second replica starts: "over-filled" (the bracket above) or "branch" (the
    #: first replica's start, its own random stream). A hysteresis kernel's ladders need
    #: "branch": inside a loop the over-filled replica condenses and stays on the other
    #: branch, so the point's replicas disagree and its mean lies between the branches
    #: (replicas from one start test reproducibility along the metastable branch instead)
    second_replica: str = "over-filled"
    #: stop production when the relative standard error of N reaches this (0: no precision
    #: target)
    target_rel_stderr: float = 0.0
    #: an absolute density error (molecules/nm^3 of pore volume) that meets the target
    #: whatever the loading: a replica is precise enough when stderr(N) <= target_rel_stderr x
    #: max(mean N, stderr_floor_per_nm3 x pore volume), the rule of `gcmc check`'s
    #: point_errors with the experiment's absolute noise as the floor (0: relative only)
    stderr_floor_per_nm3: float = 0.0
    #: a point that misses target_rel_stderr within the move budget is flagged
    #: target_not_reached (unconverged); False where the target is a build's quality target,
    #: which gcmc check judges itself (point_errors: warn up to 3 x the target)
    target_flags: bool = True
    #: the production budget per replica when production may extend (0: production_moves).
    #: With a target it runs until the target is met; without one, a budget above
    #: production_moves extends production, chunk by chunk, only while a point is not yet
    #: certified: its block error has no plateau, its halves drift, its content was not
    #: renewed through the reservoir, or its replicas disagree (dense points, whose
    #: correlation time in moves grows with the number of molecules, get the moves they need;
    #: easy points stop at production_moves)
    max_production_moves: int = 0
    #: replicas agree when |z| <= agreement_z or their means differ by <= agreement_rel
    agreement_z: float = 3.0
    agreement_rel: float = 0.01
    cells_per_cutoff: int = 1
    slab_tail: bool = True
    #: replica exchange (configuration swaps) between neighbouring pressures of a ladder
    #: (gcmc.sampling.ladder); not to be confused with the reservoir exchanges (insertions and
    #: deletions) that the few_exchanges flag counts
    replica_exchange: bool = False

    def validate(self) -> None:
        """Raise InputError naming the first setting out of range."""
        from gcmc.errors import InputError

        for name in ("equilibration_moves", "production_moves", "sample_every"):
            v = getattr(self, name)
            if not isinstance(v, int) or v < (1 if name != "equilibration_moves" else 0):
                raise InputError(f"sampling.{name}: must be a positive integer, got {v!r}")
        if self.second_replica not in SECOND_REPLICA_STARTS:
            raise InputError(
                f"sampling.second_replica: one of {', '.join(SECOND_REPLICA_STARTS)}, got "
                f"{self.second_replica!r}"
            )
        if self.production_moves < 20 * self.sample_every:
            raise InputError("sampling.production_moves: must be at least 20 x sample_every")
        if not 0.0 <= self.displacement_fraction < 1.0:
            raise InputError("sampling.displacement_fraction: must be in [0, 1)")
        if self.replicas < 1:
            raise InputError("sampling.replicas: must be >= 1")
        if self.target_rel_stderr < 0:
            raise InputError("sampling.target_rel_stderr: must be >= 0")
        if not self.stderr_floor_per_nm3 >= 0:
            raise InputError("sampling.stderr_floor_per_nm3: must be >= 0")
        if not 0.0 < self.bias_threshold < 1.0:
            raise InputError("sampling.bias_threshold: must be in (0, 1)")

    @property
    def extends(self) -> bool:
        """Production may run past production_moves (a precision target, or a larger move
        budget to certify a point): see max_production_moves."""
        return self.target_rel_stderr > 0 or self.max_production_moves > self.production_moves

    @property
    def production_capacity(self) -> int:
        """The most production moves a replica may make."""
        if not self.extends:
            return self.production_moves
        return max(self.production_moves, self.max_production_moves)


@dataclass
class PointResult:
    """Everything measured at one state point. Densities are per pore volume (A w)."""

    temperature_K: float
    pressure_Pa: float
    fugacity_Pa: float
    activity_per_nm3: float
    eos: str
    bulk_density_per_nm3: float
    molecules_mean: float
    molecules_stderr: float
    density_per_nm3: float
    density_per_nm3_stderr: float
    excess_density_per_nm3: float
    density_mmol_per_cm3: float
    density_mmol_per_cm3_stderr: float
    excess_density_mmol_per_cm3: float
    fluid_fluid_energy_K: float
    fluid_solid_energy_K: float
    fluid_fluid_energy_kJ_per_mol: float
    fluid_solid_energy_kJ_per_mol: float
    isosteric_heat_kJ_per_mol: float
    isosteric_heat_kJ_per_mol_stderr: float
    statistical_inefficiency: float
    equilibration_moves_detected: int
    drift_z: float
    replica_means: list[float]
    replica_stderrs: list[float]
    replica_agreement_z: float
    acceptance: dict[str, float]
    insertion_trials: int
    moves: int
    seconds: float
    converged: bool
    flags: list[str] = field(default_factory=list)
    pore_volume_nm3: float = float("nan")
    #: the insertion method (k trial positions, 1 = plain) each replica sampled with; one
    #: value for all replicas of a point (decided once per point, shared_insertion_trials)
    replica_insertion_trials: list[int] = field(default_factory=list)
    #: which sampler produced the point: "point" (simulate_point), "exchange" (the pressure
    #: ladder), "tempering" (a rung of a tempering chain), "certified-tempering"
    #: (gcmc.sampling.certificate)
    method: str = "point"
    #: mean configurational energy of the box U/k (K; fluid-fluid + fluid-solid, the energy
    #: the acceptance rule uses) over all replicas' production samples, and its standard
    #: error (each replica's block-averaging error, combined for the pooled mean); NaN where
    #: not measured. The thermodynamic integration of the equilibrium anchor needs <U>.
    energy_K: float = float("nan")
    energy_K_stderr: float = float("nan")
    #: fluctuations over the production samples, pooled within replicas (each replica about
    #: its own mean): var(N), cov(N, U/k) (K) and var(U/k) (K^2); NaN where not measured.
    #: They are the exact derivatives of the grand canonical means (d<N>/d ln z = var N,
    #: d<U>/d ln z = cov(N, U), d<N>/d beta = -cov(N, U), d<U>/d beta = -var U, at a fixed
    #: activity z = f/(kT)), which the equilibrium anchor's path check compares with the
    #: changes between neighbouring states (gcmc.kernel.equilibrium.path_jumps).
    molecules_variance: float = float("nan")
    molecules_energy_covariance_K: float = float("nan")
    energy_variance_K2: float = float("nan")

    def to_dict(self) -> dict[str, Any]:
        """The result as a plain dict."""
        return asdict(self)


@dataclass
class PointOutcome:
    """A point's result with what a ladder carries on to the next point."""

    result: PointResult
    positions: np.ndarray  # final configuration of the first replica (for the ladder)
    max_displacement_nm: float
    density_profile: np.ndarray  # mean molecules per z bin (first replica)
    series_n: np.ndarray  # production samples of N (first replica, after the cut)


@dataclass
class _ReplicaRun:
    n: np.ndarray
    uff: np.ndarray
    usf: np.ndarray
    profile: np.ndarray
    box: Box
    moves: int
    seconds: float
    t0: int
    k_trials: int
    acceptance: dict[str, float]
    start_n: int = -1  # molecules when production-side equilibration began (over-filled start)
    exchanges: int = -1  # accepted insertions + deletions during production


Progress = Callable[[int], None]

# ---- the numbers of the stopping rules (shared with gcmc.sampling.ladder) -----------------
#: Equilibration and production run in this many chunks: step sizes adapt after each
#: equilibration chunk, and a target relative error is judged after each production chunk.
CHUNKS = 20
#: Samples of N a replica needs before its target relative error is judged (block averaging
#: needs several blocks of a few samples each).
MIN_SAMPLES_TARGET = 64
#: Samples of N needed for the equilibration cut (Chodera 2016) and the drift test (two
#: halves of the production); below it the point is flagged too_few_samples.
MIN_SAMPLES_DRIFT = 40
#: Samples of N (all replicas) needed for the isosteric heat from the fluctuation ratio.
MIN_SAMPLES_HEAT = 64
#: Step-size adaptation in equilibration: the displacement acceptance aimed at, the range
#: of one update factor, and the smallest step (in probe sigma). The largest step is half
#: the shortest box edge.
DISPLACEMENT_ACCEPTANCE = 0.4
STEP_FACTOR_RANGE = (0.5, 1.5)
MIN_STEP_SIGMA = 0.01


def adapted_step(step_nm: float, acceptance: float, sigma_nm: float, max_nm: float) -> float:
    """The next maximum displacement from the last chunk's displacement acceptance."""
    lo, hi = STEP_FACTOR_RANGE
    factor = np.clip(acceptance / DISPLACEMENT_ACCEPTANCE, lo, hi)
    return float(np.clip(step_nm * factor, MIN_STEP_SIGMA * sigma_nm, max_nm))


#: A replica must accept at least this many insertions + deletions in production (and at
#: least as many as the molecules it holds) for its mean N to count as sampled.
MIN_EXCHANGES = 20


def precise_enough(
    stderr_n: float, mean_n: float, settings: SamplingSettings, volume: float
) -> bool:
    """The precision target for N (molecules): stderr <= target_rel_stderr x max(mean,
    stderr_floor_per_nm3 x volume); always met without a target."""
    if settings.target_rel_stderr <= 0:
        return True
    floor = settings.stderr_floor_per_nm3 * volume
    return stderr_n <= settings.target_rel_stderr * max(mean_n, floor)


def _too_few_exchanges(exchanges: int, mean_n: float) -> bool:
    """N changes only through the reservoir: a replica holding a molecule or more on average
    that accepted fewer insertions + deletions than it holds (or than MIN_EXCHANGES) has not
    renewed its content even once, and its mean (and any error from it) reflects the
    preparation more than the activity (a frozen, solid-like packing). Below one molecule the
    pore is mostly empty and the Poisson-like block error already states the precision.
    ``exchanges`` < 0: not recorded (replica-exchange rungs)."""
    return mean_n >= 1.0 and 0 <= exchanges < max(MIN_EXCHANGES, mean_n)


def _replicas_agree(
    settings: SamplingSettings, m0: float, e0: float, m1: float, e1: float
) -> tuple[float, bool]:
    """(z, agree) of two replicas' means: within agreement_z combined errors or agreement_rel."""
    return st.agreement(
        m0, e0, m1, e1, threshold=settings.agreement_z, rel_tol=settings.agreement_rel
    )


def _chunk(moves: int) -> int:
    """Moves between step-size adaptations of an equilibration of ``moves`` moves."""
    return max(1, moves // CHUNKS)


def _half_point(moves: int) -> int:
    """Where an equilibration of ``moves`` moves is split for the shared insertion-method
    decision: the first adaptation boundary at or past its middle."""
    per = _chunk(moves)
    return min(moves, -(-(moves // 2) // per) * per)


def _equilibrate(
    box: Box,
    moves: int,
    settings: SamplingSettings,
    progress: Progress | None,
    clock: list[float],
    auto_bias: bool = False,
    start: int = 0,
    stop: int | None = None,
) -> tuple[int, int]:
    """Run the moves ``start`` to ``stop`` (default: all) of an equilibration of ``moves``
    moves, with step-size adaptation every ``_chunk(moves)`` moves (equilibration only; a run
    split at an adaptation boundary makes the same moves as one unsplit run). Returns the
    insertion attempts and acceptances of the chunks that start in the second half of the
    moves from 0 to ``stop`` (the window the shared insertion-method rule reads, see
    :func:`shared_insertion_trials`).

    ``auto_bias``: switch this box to biased insertion in the second half when plain insertion
    is accepted less than ``bias_threshold`` per attempt. Only the over-filled replica's
    preparation at a multiple of the activity uses it (any method that fills the pore will
    do there); the method the replicas sample with is decided for both of them at once."""
    tries = accepts = 0
    stop = moves if stop is None else min(stop, moves)
    if stop <= start:
        return tries, accepts
    per = _chunk(moves)
    done = start
    sig = box.model.probe.sigma_nm
    lmax = 0.5 * min(box.model.box_lengths_nm)
    auto_bias = auto_bias and settings.insertion_trials == 0
    while done < stop:
        step = min(per, stop - done)
        box.reset_counters()
        t = time.perf_counter()
        box.run(step)
        clock[0] += time.perf_counter() - t
        in_window = done >= stop // 2
        done += step
        if in_window:
            n_try, n_acc = insertion_counts_of(box.counters)
            tries += n_try
            accepts += n_acc
        acc = box.acceptance()
        a = acc["displacement"]
        if math.isfinite(a):
            box.max_displacement_nm = adapted_step(box.max_displacement_nm, a, sig, lmax)
        if auto_bias and done >= moves // 2 and box.insertion_trials == 1:
            ins = acc["insertion"]
            if math.isfinite(ins) and ins < settings.bias_threshold and box.n_molecules > 0:
                box.set_insertion_trials(settings.biased_trials)
        if progress:
            progress(step)
    return tries, accepts


def shared_insertion_trials(
    settings: SamplingSettings,
    tries: list[int],
    accepts: list[int],
    holds: list[bool],
    prepared: list[int] | None = None,
) -> int:
    """The insertion method (k trial positions; 1 = plain) that every replica of a point
    samples with, decided once per point from all its replicas alike.

    A fixed ``settings.insertion_trials`` > 0 is used as given. Automatic (0): biased
    insertion with ``biased_trials`` when any replica calls for it, plain insertion otherwise.
    A replica calls for it when its plain insertion at the point's activity, in its
    measurement window (``tries`` attempts, ``accepts`` accepted), is accepted less than
    ``bias_threshold`` per attempt while the pore holds a molecule (``holds``), or when its
    over-filled preparation had to switch to biased insertion (``prepared``: the k each
    preparation ended with; the dense side the point is approached from is then too dense for
    plain insertion). One decision for all: otherwise the replica from below and the
    over-filled one each decide from their own history and sample with different methods.
    The most demanding replica decides, because plain insertion where one replica finds it
    failing leaves block errors without a plateau (benchmarks/README.md, "Replica agreement in
    builds")."""
    if settings.insertion_trials > 0:
        return int(settings.insertion_trials)
    biased = int(settings.biased_trials)
    if prepared is not None and any(k > 1 for k in prepared):
        return biased
    for n_try, n_acc, held in zip(tries, accepts, holds, strict=True):
        if held and n_try > 0 and n_acc / n_try < settings.bias_threshold:
            return biased
    return 1


class _Replica:
    """One replica of a point: its box, prepared (over-filled if asked, equilibrated), then
    produced in chunks, so that several replicas can run side by side until they agree."""

    def __init__(
        self,
        model: PoreModel,
        state: ThermoState,
        settings: SamplingSettings,
        rng: np.ndarray,
        start: np.ndarray | None,
        overfill: bool,
        max_disp: float | None,
        progress: Progress | None,
    ) -> None:
        options = EngineOptions(
            cells_per_cutoff=settings.cells_per_cutoff,
            insertion_trials=max(1, settings.insertion_trials),
            displacement_fraction=settings.displacement_fraction,
            slab_tail=settings.slab_tail,
        )
        z = state.activity_nm3
        box = Box(
            model, state.temperature_K, z, options, rng_state=rng, max_displacement_nm=max_disp
        )
        if start is not None and len(start):
            box.load_positions(start)
        self.box = box
        self.settings = settings
        self.progress = progress
        self.clock = [0.0]
        eq = settings.equilibration_moves
        self.moves = 0  # all trial moves of this replica
        self.start_n = -1
        self.prepared_k = 1  # the insertion method the over-filled preparation ended with
        if overfill:
            box.activity_nm3 = z * settings.overfill_factor
            _equilibrate(box, eq // 2, settings, progress, self.clock, auto_bias=True)
            self.moves += eq // 2
            box.activity_nm3 = z
            self.start_n = box.n_molecules
            self.prepared_k = box.insertion_trials
            # the preparation's method is not the sampling method: back to the configured
            # one (plain when automatic) until the point decides for all replicas
            box.set_insertion_trials(max(1, settings.insertion_trials))
        # first half of the equilibration at the point's activity, with the configured method
        # (plain when automatic); its second half is the measurement window of the shared rule
        # (with a configured method, the split run makes the same moves as an unsplit one)
        self.first = _half_point(eq)
        self.insertion_tries, self.insertion_accepts = _equilibrate(
            box, eq, settings, progress, self.clock, stop=self.first
        )
        self.moves += self.first

    def settle(self, k_trials: int) -> None:
        """Adopt the point's insertion method and run the rest of the equilibration."""
        settings, box = self.settings, self.box
        eq = settings.equilibration_moves
        box.set_insertion_trials(k_trials)
        _equilibrate(box, eq, settings, self.progress, self.clock, start=self.first)
        self.moves += eq - self.first
        # production: room for the whole move budget when stopping on a target
        every = settings.sample_every
        self.total = settings.production_capacity
        n_samples = self.total // every
        self.out_n = np.zeros(n_samples, dtype=np.int64)
        self.out_uff = np.zeros(n_samples)
        self.out_usf = np.zeros(n_samples)
        self.profile = np.zeros(box.n_bins)
        self.written = 0
        self.produced = 0  # production moves
        self.chunk = max(every, (settings.production_moves // CHUNKS) // every * every)
        box.reset_counters()

    @property
    def exhausted(self) -> bool:
        return self.produced >= self.total

    def produce(self, moves: int) -> None:
        step = min(moves, self.total - self.produced)
        if step <= 0:
            return
        t = time.perf_counter()
        self.written += self.box.run(
            step,
            self.settings.sample_every,
            self.out_n,
            self.out_uff,
            self.out_usf,
            self.written,
            self.profile,
        )
        self.clock[0] += time.perf_counter() - t
        self.produced += step
        if self.progress:
            self.progress(step)

    @property
    def exchanges(self) -> int:
        """Accepted insertions + deletions so far in production."""
        return self.box.exchanges

    def meets_target(self) -> tuple[bool, float, float]:
        """(done, mean, stderr) of N so far: the error is reliable (a block-averaging
        plateau), the target relative error (if any) is met, the drift test passes and the
        content was renewed through the reservoir (an empty pore is done)."""
        if self.produced < self.settings.production_moves or self.written < MIN_SAMPLES_TARGET:
            return False, math.nan, math.nan
        x = self.out_n[: self.written].astype(float)
        if x.max() == 0.0:
            return True, 0.0, 0.0  # nothing entered: nothing to converge
        x = x[_equilibration_cut(x) :]  # judged as the point will be (see finish)
        if len(x) < MIN_SAMPLES_TARGET:
            return False, math.nan, math.nan
        est = st.block_average(x)
        mean, err = est.mean, est.stderr
        ok = (
            est.reliable
            and mean > 0
            and precise_enough(err, mean, self.settings, self.box.model.pore_volume_nm3)
            and st.drift_test(x).passed
            and not _too_few_exchanges(self.exchanges, mean)
        )
        return bool(ok), mean, err

    def finish(self) -> _ReplicaRun:
        n = self.out_n[: self.written]
        uff = self.out_uff[: self.written]
        usf = self.out_usf[: self.written]
        t0 = _equilibration_cut(n)
        return _ReplicaRun(
            n=n[t0:],
            uff=uff[t0:],
            usf=usf[t0:],
            profile=self.profile / max(self.written, 1),
            box=self.box,
            moves=self.moves + self.produced,
            seconds=self.clock[0],
            t0=t0,
            k_trials=self.box.insertion_trials,
            acceptance=self.box.acceptance(),
            start_n=self.start_n,
            exchanges=self.exchanges,
        )


def _equilibration_cut(n: np.ndarray) -> int:
    """Samples to drop from the start of a production series (Chodera 2016; none if the
    series is short or constant)."""
    if len(n) >= MIN_SAMPLES_DRIFT and np.ptp(n) > 0:
        return int(st.detect_equilibration(np.asarray(n, dtype=float))[0])
    return 0


def _produce_replicas(reps: list[_Replica], settings: SamplingSettings) -> None:
    """Production of all replicas of a point, in alternating chunks. With a fixed length, each
    runs production_moves. When production may extend (``settings.extends``: a target
    relative error, or a move budget above production_moves), they run until every replica
    is done (:meth:`_Replica.meets_target`: reliable error, target met if any, no drift,
    content renewed) and the replicas agree (the same test as the point's replicas_disagree
    flag), or until the move budget is spent: easy points stop early, hard ones use the
    budget and keep their flags."""
    target = settings.extends
    while not all(r.exhausted for r in reps):
        for r in reps:
            r.produce(r.chunk)
        if not target:
            continue
        checks = [r.meets_target() for r in reps]
        if not all(c[0] for c in checks):
            continue
        if len(reps) >= 2:
            _, agree = _replicas_agree(settings, *checks[0][1:], *checks[1][1:])
            if not agree:
                continue
        break


def _blocked_result(model: PoreModel, state: ThermoState) -> PointOutcome:
    nan = float("nan")
    r = PointResult(
        temperature_K=state.temperature_K,
        pressure_Pa=state.pressure_Pa,
        fugacity_Pa=state.fugacity_Pa,
        activity_per_nm3=state.activity_nm3,
        eos=state.eos,
        bulk_density_per_nm3=state.bulk_density_per_nm3,
        molecules_mean=0.0,
        molecules_stderr=0.0,
        density_per_nm3=0.0,
        density_per_nm3_stderr=0.0,
        excess_density_per_nm3=0.0,
        density_mmol_per_cm3=0.0,
        density_mmol_per_cm3_stderr=0.0,
        excess_density_mmol_per_cm3=0.0,
        fluid_fluid_energy_K=nan,
        fluid_solid_energy_K=nan,
        fluid_fluid_energy_kJ_per_mol=nan,
        fluid_solid_energy_kJ_per_mol=nan,
        isosteric_heat_kJ_per_mol=nan,
        isosteric_heat_kJ_per_mol_stderr=nan,
        statistical_inefficiency=1.0,
        equilibration_moves_detected=0,
        drift_z=0.0,
        replica_means=[0.0],
        replica_stderrs=[0.0],
        replica_agreement_z=0.0,
        acceptance={},
        insertion_trials=0,
        moves=0,
        seconds=0.0,
        converged=True,
        flags=[fl.flag_text(fl.INACCESSIBLE)],
        pore_volume_nm3=model.pore_volume_nm3,
    )
    return PointOutcome(
        result=r,
        positions=np.zeros((0, 3)),
        max_displacement_nm=0.0,
        density_profile=np.zeros(1),
        series_n=np.zeros(0),
    )


def simulate_point(
    model: PoreModel,
    state: ThermoState,
    settings: SamplingSettings,
    seed: np.random.SeedSequence | int,
    start: np.ndarray | None = None,
    max_displacement_nm: float | None = None,
    progress: Progress | None = None,
    from_above: bool = False,
) -> PointOutcome:
    """Simulate one state point. ``start`` is an initial configuration (e.g. the previous
    point of a pressure ladder); ``from_above``: every replica starts over-filled (a cold
    start on the condensed side, e.g. a desorption point rerun without its ladder); the
    result is a deterministic function of the arguments."""
    if model.geometry == SLIT and pore_limit(model, state.temperature_K).blocked:
        return _blocked_result(model, state)
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    streams = ss.spawn(settings.replicas)
    reps = [
        _Replica(
            model,
            state,
            settings,
            seed_state(streams[r]),
            start,
            overfill=from_above or (r == 1 and settings.second_replica == "over-filled"),
            max_disp=max_displacement_nm,
            progress=progress,
        )
        for r in range(settings.replicas)
    ]
    k_trials = shared_insertion_trials(
        settings,
        [r.insertion_tries for r in reps],
        [r.insertion_accepts for r in reps],
        [r.box.n_molecules > 0 for r in reps],
        [r.prepared_k for r in reps],
    )
    for r in reps:
        r.settle(k_trials)
    _produce_replicas(reps, settings)
    runs = [r.finish() for r in reps]
    return _analyse(model, state, settings, runs)


def pooled_fluctuations(runs: list[_ReplicaRun]) -> tuple[float, float, float]:
    """var(N), cov(N, U/k) and var(U/k) of the replicas' production samples, each replica's
    deviations taken about its own means (replicas on different branches do not inflate
    them); NaN with fewer than MIN_SAMPLES_HEAT samples in all."""
    size = sum(len(r.n) for r in runs)
    if size <= max(MIN_SAMPLES_HEAT, len(runs)):
        return math.nan, math.nan, math.nan
    snn = snu = suu = 0.0
    for r in runs:
        if len(r.n) == 0:
            continue
        dn = np.asarray(r.n, float) - float(np.mean(r.n))
        u = np.asarray(r.uff + r.usf, float)
        du = u - float(u.mean())
        snn += float(dn @ dn)
        snu += float(dn @ du)
        suu += float(du @ du)
    dof = size - sum(1 for r in runs if len(r.n))
    return snn / dof, snu / dof, suu / dof


def _analyse(
    model: PoreModel, state: ThermoState, settings: SamplingSettings, runs: list[_ReplicaRun]
) -> PointOutcome:
    flags: list[str] = []
    vol = model.pore_volume_nm3
    ests = [st.block_average(r.n.astype(float)) for r in runs]
    means = [e.mean for e in ests]
    errs = [e.stderr for e in ests]
    for i, e in enumerate(ests):
        if not e.reliable:
            flags.append(fl.flag_text(fl.ERROR_UNRELIABLE, i, e.reason))
    drift = [
        st.drift_test(r.n.astype(float)) if len(r.n) >= MIN_SAMPLES_DRIFT else None for r in runs
    ]
    dz = 0.0
    for i, d in enumerate(drift):
        if d is None:
            flags.append(fl.flag_text(fl.TOO_FEW_SAMPLES, i))
        else:
            dz = max(dz, abs(d.z_score)) if math.isfinite(d.z_score) else dz
            if not d.passed:
                flags.append(fl.flag_text(fl.DRIFT, i, f"first vs second half z = {d.z_score:.1f}"))
    agree_z = 0.0
    if len(runs) >= 2:
        agree_z, ok = _replicas_agree(settings, means[0], errs[0], means[1], errs[1])
        if not ok:
            detail = f"{means[0]:.4g} vs {means[1]:.4g} (z = {agree_z:.1f})"
            flags.append(fl.flag_text(fl.REPLICAS_DISAGREE, detail=detail))
    for i, r in enumerate(runs):
        if _too_few_exchanges(r.exchanges, means[i]):
            detail = (
                f"{r.exchanges} accepted insertions + deletions in production for "
                f"N = {means[i]:.4g}"
            )
            flags.append(fl.flag_text(fl.FEW_EXCHANGES, i, detail))
    below = means[0] * (1.0 - settings.agreement_rel)
    if len(runs) >= 2 and means[0] >= 1.0 and 0 <= runs[1].start_n < below:
        # the two-sided check needs the second replica to come from above, or at least from
        # no further below than the replicas' agreement tolerance (a nearly incompressible,
        # filled pore barely takes more molecules at 20 z); below one molecule on average the
        # replicas mix at once and the over-fill may land on N = 0 by chance
        detail = (
            f"the over-filled replica started at N = {runs[1].start_n}, below the first "
            f"replica's mean {means[0]:.4g}"
        )
        flags.append(fl.flag_text(fl.NOT_BRACKETED, detail=detail))
    # Pool the replicas (inverse-variance weights where errors are available).
    w = np.array([1.0 / e**2 if e > 0 else 0.0 for e in errs])
    if w.sum() > 0 and all(e > 0 for e in errs):
        n_mean = float(np.sum(w * means) / w.sum())
        n_err = float(1.0 / math.sqrt(w.sum()))
    else:
        n_mean = float(np.mean(means))
        n_err = float(max(errs)) if errs else float("nan")
    if len(runs) >= 2 and fl.has_flag(flags, fl.REPLICAS_DISAGREE):
        n_err = max(n_err, 0.5 * abs(means[0] - means[1]))  # an honest spread
    n_all = np.concatenate([r.n for r in runs]).astype(float)
    u_all = np.concatenate([r.uff + r.usf for r in runs])
    uff_all = np.concatenate([r.uff for r in runs])
    usf_all = np.concatenate([r.usf for r in runs])
    nbar = float(n_all.mean()) if len(n_all) else 0.0
    eff = nbar if nbar > 0 else float("nan")
    uff_per = float(uff_all.mean() / eff) if len(uff_all) else float("nan")
    usf_per = float(usf_all.mean() / eff) if len(usf_all) else float("nan")
    q = q_err = float("nan")
    if len(n_all) > MIN_SAMPLES_HEAT and np.var(n_all) > 0:
        ratio, ratio_err = st.fluctuation_ratio(runs[0].uff + runs[0].usf, runs[0].n.astype(float))
        if math.isfinite(ratio):
            q = kelvin_to_kj_per_mol(state.temperature_K + state.residual_enthalpy_K - ratio)
            q_err = kelvin_to_kj_per_mol(ratio_err)
    energy = energy_err = float("nan")
    if len(u_all):
        energy = float(u_all.mean())
        weights = np.array([len(r.n) for r in runs], float) / len(u_all)
        u_errs = [
            st.block_average(np.asarray(r.uff + r.usf, float)).stderr if len(r.n) else 0.0
            for r in runs
        ]
        energy_err = float(np.sqrt(np.sum((weights * np.asarray(u_errs)) ** 2)))
    n_var, nu_cov, u_var = pooled_fluctuations(runs)
    del u_all
    ineff = ests[0].inefficiency
    density = n_mean / vol if vol > 0 else float("nan")
    density_err = n_err / vol if vol > 0 else float("nan")
    bulk = state.bulk_density_per_nm3
    excess = density - bulk if math.isfinite(bulk) else float("nan")
    converged = not fl.makes_unconverged(flags)
    if settings.target_flags and n_mean > 0 and not precise_enough(n_err, n_mean, settings, vol):
        detail = (
            f"rel. error {n_err / n_mean:.2g} > {settings.target_rel_stderr:.2g} within the "
            "move budget"
        )
        flags.append(fl.flag_text(fl.TARGET_NOT_REACHED, detail=detail))
        converged = not fl.makes_unconverged(flags)
    r0 = runs[0]
    result = PointResult(
        temperature_K=state.temperature_K,
        pressure_Pa=state.pressure_Pa,
        fugacity_Pa=state.fugacity_Pa,
        activity_per_nm3=state.activity_nm3,
        eos=state.eos,
        bulk_density_per_nm3=bulk,
        molecules_mean=n_mean,
        molecules_stderr=n_err,
        density_per_nm3=density,
        density_per_nm3_stderr=density_err,
        excess_density_per_nm3=excess,
        density_mmol_per_cm3=per_nm3_to_mmol_per_cm3(density),
        density_mmol_per_cm3_stderr=per_nm3_to_mmol_per_cm3(density_err),
        excess_density_mmol_per_cm3=per_nm3_to_mmol_per_cm3(excess),
        fluid_fluid_energy_K=uff_per,
        fluid_solid_energy_K=usf_per,
        fluid_fluid_energy_kJ_per_mol=kelvin_to_kj_per_mol(uff_per),
        fluid_solid_energy_kJ_per_mol=kelvin_to_kj_per_mol(usf_per),
        isosteric_heat_kJ_per_mol=q,
        isosteric_heat_kJ_per_mol_stderr=q_err,
        statistical_inefficiency=float(ineff),
        equilibration_moves_detected=int(
            settings.equilibration_moves + r0.t0 * settings.sample_every
        ),
        drift_z=float(dz),
        replica_means=[float(m) for m in means],
        replica_stderrs=[float(e) for e in errs],
        replica_agreement_z=float(agree_z),
        acceptance=r0.acceptance,
        insertion_trials=r0.k_trials,
        moves=int(sum(r.moves for r in runs)),
        seconds=float(sum(r.seconds for r in runs)),
        converged=converged,
        flags=flags,
        pore_volume_nm3=vol,
        replica_insertion_trials=[int(r.k_trials) for r in runs],
        energy_K=energy,
        energy_K_stderr=energy_err,
        molecules_variance=n_var,
        molecules_energy_covariance_K=nu_cov,
        energy_variance_K2=u_var,
    )
    return PointOutcome(
        result=result,
        positions=r0.box.positions(),
        max_displacement_nm=r0.box.max_displacement_nm,
        density_profile=r0.profile,
        series_n=r0.n,
    )
