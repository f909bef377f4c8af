"""A simulation box for the compiled engine: builds the cell structure for a PoreModel at a
temperature and activity, runs moves, and converts configurations in and out.

This is the only place that knows the engine's array layout (see gcmc.sampling.engine).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from gcmc.physics.model import BULK, SLIT, PoreModel
from gcmc.physics.potentials import (
    OVERLAP_BETA_U,
    homogeneous_tail_constant,
    overlap_distance_nm,
    slab_tail_pair,
    steele_prefactor_k,
)
from gcmc.sampling import engine as E

#: z-bin width for the density profile and the slab tail correction, in probe diameters.
ZBIN_SIGMA = 0.02


@dataclass(frozen=True)
class EngineOptions:
    """Numerical options of the engine that do not change the physics."""

    cells_per_cutoff: int = 1  # cell edge >= r_c / cells_per_cutoff
    insertion_trials: int = 1  # k trial positions per insertion / deletion (1 = plain)
    displacement_fraction: float = 0.5
    slab_tail: bool = True  # slit pores: add the slab tail correction beyond r_c


class Box:
    """The state of one GCMC simulation: arrays for the compiled engine."""

    def __init__(
        self,
        model: PoreModel,
        temperature_k: float,
        activity_nm3: float,
        options: EngineOptions | None = None,
        rng_state: np.ndarray | None = None,
        max_displacement_nm: float | None = None,
    ):
        self.model = model
        self.options = options or EngineOptions()
        self.temperature_k = float(temperature_k)
        lx, ly, lz = model.box_lengths_nm
        rc = model.cutoff_nm
        sig = model.probe.sigma_nm
        eps = model.probe.epsilon_k
        slit = model.geometry == SLIT
        m = max(1, int(self.options.cells_per_cutoff))
        side = rc / m
        nc = [max(1, int(math.floor(length / side + 1e-12))) for length in (lx, ly, lz)]
        self.n_cells_xyz = tuple(nc)
        ncell = nc[0] * nc[1] * nc[2]
        a = [length / n for length, n in zip((lx, ly, lz), nc, strict=True)]
        r_ov = overlap_distance_nm(eps, sig, self.temperature_k)
        # close-packing bound + 8: the pair loop reads slots up to the next multiple of 8
        cap = int(math.sqrt(2.0) * (a[0] + r_ov) * (a[1] + r_ov) * (a[2] + r_ov) / r_ov**3) + 8

        fp = np.zeros(E.N_FPARAMS)
        ip = np.zeros(E.N_IPARAMS, dtype=np.int64)
        fp[E.F_LX], fp[E.F_LY], fp[E.F_LZ] = lx, ly, lz
        fp[E.F_INV_CX], fp[E.F_INV_CY], fp[E.F_INV_CZ] = 1 / a[0], 1 / a[1], 1 / a[2]
        fp[E.F_RC2] = rc * rc
        fp[E.F_SIG2] = sig * sig
        fp[E.F_EPS4] = 4.0 * eps
        fp[E.F_BETA] = 1.0 / self.temperature_k
        fp[E.F_VOLUME] = lx * ly * lz
        fp[E.F_ZV] = activity_nm3 * fp[E.F_VOLUME]
        fp[E.F_ROV2] = r_ov * r_ov
        fp[E.F_MAX_BETA_U] = OVERLAP_BETA_U
        fp[E.F_P_DISPLACE] = self.options.displacement_fraction
        fp[E.F_DMAX] = max_displacement_nm if max_displacement_nm else 0.3 * sig
        if slit:
            sf = model.solid_fluid
            fp[E.F_WALL_PRE] = steele_prefactor_k(model)
            fp[E.F_SIG_SF] = sf.sigma_nm
            fp[E.F_DELTA] = model.solid.interlayer_nm
        else:
            fp[E.F_LRC_C] = homogeneous_tail_constant(eps, sig, rc)
        nbins = max(1, int(math.ceil(lz / (ZBIN_SIGMA * sig))))
        fp[E.F_INV_DZ] = nbins / lz
        ip[E.I_NCX], ip[E.I_NCY], ip[E.I_NCZ] = nc
        ip[E.I_SLIT] = 1 if slit else 0
        ip[E.I_KTRIALS] = max(1, int(self.options.insertion_trials))
        ip[E.I_NBINS] = nbins
        tail_table = np.zeros(nbins)
        if slit and self.options.slab_tail:
            ip[E.I_SLAB] = 1
            area = lx * ly
            dz = lz / nbins
            phi_c = float(slab_tail_pair(0.0, eps, sig, rc))
            fp[E.F_SLAB_C] = phi_c / area
            d = np.arange(nbins) * dz
            tail_table = (slab_tail_pair(d, eps, sig, rc) - phi_c) / area
        self.fp, self.ip = fp, ip
        self.tail_table = tail_table
        self.cell_xyz = np.zeros((ncell, 3, cap))
        self.cell_n = np.zeros(ncell, dtype=np.int64)
        self.cell_pid = np.zeros((ncell, cap), dtype=np.int64)
        nmax = ncell * cap
        self.pid_cell = np.zeros(nmax, dtype=np.int64)
        self.pid_slot = np.zeros(nmax, dtype=np.int64)
        self.nbr, self.nbr_n = _neighbour_cells(nc, a, rc, m, periodic_z=not slit)
        self.zbin_n = np.zeros(nbins, dtype=np.int64)
        self.energy = np.zeros(2)
        self.counters = np.zeros(E.N_COUNTERS, dtype=np.int64)
        self.rng = rng_state if rng_state is not None else np.array([1, 2, 3, 4], dtype=np.uint64)
        self.capacity = cap
        self._scratch = np.empty((6, max(1, int(ip[E.I_KTRIALS]))))

    # -- parameters ---------------------------------------------------------------------
    @property
    def n_molecules(self) -> int:
        """Molecules in the box now."""
        return int(self.ip[E.I_N])

    @property
    def n_bins(self) -> int:
        """Number of z bins of the density profile."""
        return int(self.ip[E.I_NBINS])

    @property
    def max_displacement_nm(self) -> float:
        """Maximum displacement of a translation move (nm)."""
        return float(self.fp[E.F_DMAX])

    @max_displacement_nm.setter
    def max_displacement_nm(self, value: float) -> None:
        self.fp[E.F_DMAX] = value

    @property
    def activity_nm3(self) -> float:
        """Activity z = f/kT of the reservoir (nm^-3)."""
        return float(self.fp[E.F_ZV] / self.fp[E.F_VOLUME])

    @activity_nm3.setter
    def activity_nm3(self, value: float) -> None:
        self.fp[E.F_ZV] = value * self.fp[E.F_VOLUME]

    @property
    def insertion_trials(self) -> int:
        """Trial positions per insertion (1: plain insertion; more: biased insertion)."""
        return int(self.ip[E.I_KTRIALS])

    def set_insertion_trials(self, k: int) -> None:
        """Set the trial positions per insertion (at least 1)."""
        self.ip[E.I_KTRIALS] = max(1, int(k))

    # -- moves ------------------------------------------------------------------------------
    def run(
        self,
        n_moves: int,
        sample_every: int = 0,
        out_n: np.ndarray | None = None,
        out_uff: np.ndarray | None = None,
        out_usf: np.ndarray | None = None,
        out_start: int = 0,
        profile: np.ndarray | None = None,
    ) -> int:
        """Run n_moves trial moves, sampling every sample_every moves (0: no sampling)."""
        if out_n is None:
            out_n = np.zeros(1, dtype=np.int64)
            out_uff = np.zeros(1)
            out_usf = np.zeros(1)
            sample_every = 0
        if profile is None:
            profile = np.zeros(self.n_bins)
        k_trials = max(1, int(self.ip[E.I_KTRIALS]))
        if self._scratch.shape[1] < k_trials:  # biased-insertion trials changed (ladder, auto)
            self._scratch = np.empty((6, k_trials))
        return E.run_moves(
            int(n_moves),
            int(sample_every),
            self.fp,
            self.ip,
            self.cell_xyz,
            self.cell_n,
            self.cell_pid,
            self.pid_cell,
            self.pid_slot,
            self.nbr,
            self.nbr_n,
            self.zbin_n,
            self.tail_table,
            self.rng,
            self.energy,
            self.counters,
            out_n,
            out_uff,
            out_usf,
            int(out_start),
            profile,
            self._scratch,
        )

    def recomputed_energy(self) -> tuple[float, float]:
        """(U_ff, U_sf) recomputed from scratch (K)."""
        return E.total_energy(
            self.fp,
            self.ip,
            self.cell_xyz,
            self.cell_n,
            self.cell_pid,
            self.pid_cell,
            self.pid_slot,
            self.nbr,
            self.nbr_n,
            self.zbin_n,
            self.tail_table,
        )

    # -- configurations ---------------------------------------------------------------------
    def positions(self) -> np.ndarray:
        """The molecules' positions (N, 3) in nm, a copy."""
        n = self.n_molecules
        c = self.pid_cell[:n]
        s = self.pid_slot[:n]
        return np.stack([self.cell_xyz[c, k, s] for k in range(3)], axis=1)

    def load_positions(self, positions: np.ndarray) -> int:
        """Replace the configuration; molecules that overlap (or lie outside the box) are
        dropped, and the energy is recomputed. Returns the number loaded."""
        self.cell_n[:] = 0
        self.zbin_n[:] = 0
        self.ip[E.I_N] = 0
        lx, ly, lz = self.model.box_lengths_nm
        slit = self.model.geometry == SLIT
        for x, y, z in np.asarray(positions, dtype=float).reshape(-1, 3):
            x, y = x % lx, y % ly
            if slit:
                if not 0.0 < z < lz:
                    continue
            else:
                z = z % lz
            dff, dsf, ov = E.trial_energy(
                x,
                y,
                z,
                -1,
                -1,
                self.n_molecules,
                -1,
                self.fp,
                self.ip,
                self.cell_xyz,
                self.cell_n,
                self.nbr,
                self.nbr_n,
                self.zbin_n,
                self.tail_table,
            )
            if ov:
                continue
            E.add_molecule(
                x,
                y,
                z,
                self.ip,
                self.fp,
                self.cell_xyz,
                self.cell_n,
                self.cell_pid,
                self.pid_cell,
                self.pid_slot,
                self.zbin_n,
            )
        self.energy[:] = self.recomputed_energy()
        return self.n_molecules

    def acceptance(self) -> dict[str, float]:
        """Accepted fraction of each move kind since the counters were last reset."""
        return acceptance_ratios(self.counters)

    @property
    def exchanges(self) -> int:
        """Accepted insertions + deletions since the counters were last reset."""
        return exchanges_of(self.counters)

    def reset_counters(self) -> None:
        """Zero the move counters."""
        self.counters[:] = 0


def new_counters() -> np.ndarray:
    """A zeroed array in the layout of :attr:`Box.counters` (to accumulate them elsewhere)."""
    return np.zeros(E.N_COUNTERS, dtype=np.int64)


def acceptance_ratios(counters: np.ndarray) -> dict[str, float]:
    """Accepted fraction of displacements, insertions and deletions from move counters in
    the layout of :attr:`Box.counters` (NaN for a move kind never tried)."""
    c = counters

    def ratio(a: int, b: int) -> float:
        return float(c[a] / c[b]) if c[b] else float("nan")

    return {
        "displacement": ratio(E.C_DISP_ACC, E.C_DISP_TRY),
        "insertion": ratio(E.C_INS_ACC, E.C_INS_TRY),
        "deletion": ratio(E.C_DEL_ACC, E.C_DEL_TRY),
    }


def exchanges_of(counters: np.ndarray) -> int:
    """Accepted insertions + deletions from move counters in the layout of
    :attr:`Box.counters`."""
    return int(counters[E.C_INS_ACC] + counters[E.C_DEL_ACC])


def _neighbour_cells(
    nc: list[int], a: list[float], rc: float, m: int, periodic_z: bool
) -> tuple[np.ndarray, np.ndarray]:
    """The distinct cells whose boxes come within r_c of each cell: itself first, then the
    others nearest first."""
    ncx, ncy, ncz = nc
    # offsets nearest first (the home cell leads), so that the overlap test of a trial
    # position usually stops in the first cells it scans
    offsets = [
        (dx, dy, dz)
        for dz in range(-m, m + 1)
        for dy in range(-m, m + 1)
        for dx in range(-m, m + 1)
    ]
    stencil = sorted(offsets, key=lambda d: (d[0] ** 2 + d[1] ** 2 + d[2] ** 2, d[2], d[1], d[0]))
    lists = []
    for iz in range(ncz):
        for iy in range(ncy):
            for ix in range(ncx):
                found: list[int] = []
                for dx, dy, dz in stencil:
                    jz = iz + dz
                    if periodic_z:
                        jz %= ncz
                    elif jz < 0 or jz >= ncz:
                        continue
                    jy = (iy + dy) % ncy
                    jx = (ix + dx) % ncx
                    gap2 = sum(
                        (max(0, abs(d) - 1) * side) ** 2
                        for d, side in zip((dx, dy, dz), a, strict=True)
                    )
                    if gap2 >= rc * rc:
                        continue
                    j = (jz * ncy + jy) * ncx + jx
                    if j not in found:
                        found.append(j)
                lists.append(found)  # home cell first, then outwards
    width = max(len(x) for x in lists)
    nbr = np.full((len(lists), width), -1, dtype=np.int64)
    nbr_n = np.zeros(len(lists), dtype=np.int64)
    for c, cells in enumerate(lists):
        nbr[c, : len(cells)] = cells
        nbr_n[c] = len(cells)
    return nbr, nbr_n


def warm_up() -> float:
    """Load (or compile) the engine on a tiny system; returns the seconds it took."""
    import time

    from gcmc.physics.model import Probe, Solid

    t0 = time.perf_counter()
    probe = Probe(name="warm-up", epsilon_k=120.0, sigma_nm=0.34)
    for geom in (SLIT, BULK):
        model = PoreModel(
            probe=probe, solid=Solid(), geometry=geom, cutoff_nm=0.85, box_nm=1.8, width_nm=1.2
        )
        box = Box(model, 120.0, 1.0)
        n = np.zeros(4, dtype=np.int64)
        box.run(200, 50, n, np.zeros(4), np.zeros(4), 0, np.zeros(box.n_bins))
        box.recomputed_energy()
        box.load_positions(box.positions())
    return time.perf_counter() - t0
