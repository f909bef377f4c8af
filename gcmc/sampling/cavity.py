"""Cavity-biased grand canonical exchange (Mezei, Mol. Phys. 40 (1980) 901), made exact by
counting the cavities on a fixed grid instead of estimating their probability by sampling.

Grid. The box is covered by a fixed grid of n_x x n_y x n_z cells; each edge holds a whole
number of cells of edge as close as possible to ``grid_sigma`` x sigma (so the cells are cubes
up to the rounding of L_a / g to a whole number; v = g_x g_y g_z is their volume, and that is
all the acceptance rules need). occ[c] is the number of molecule centres within R_c (minimum
image, strictly closer) of cell c's centre; a cell is a **cavity** when it is *allowed* and
occ[c] == 0. In a slit, a cell is not allowed when beta V_wall > ``wall_cutoff_beta_u`` (40)
at its centre and at both of its z faces: there exp(-beta V_wall) < 4e-18, the region's
Boltzmann weight is negligible, and counting its empty cells as cavities would only waste
insertions next to the walls. (Excluding cells changes no equilibrium property, only which
configurations the exchange moves connect: a molecule in an excluded cell cannot be deleted,
and no molecule is inserted there, so the two rates between such a pair of states are both
zero; displacements still reach every configuration.) n_cav cavities, V_cav = n_cav v, are
kept in a list (swap-remove, with each cell's position in the list) that every accepted
insertion, deletion and displacement updates incrementally, looping over the cells of a
stencil that contains every cell whose centre can lie within R_c of a point in the
molecule's grid cell, each with its distance test.

Moves (displacements as the engine's; the rest half insertions, half deletions):

- insertion: a cavity cell uniformly from the list, a position uniform in it (rejected if
  rounding puts it in another cell), accepted with min(1, z V_cav exp(-beta dU) / (N + 1)),
  V_cav of the current configuration (n_cav = 0: rejected);
- deletion of a uniformly chosen molecule j: j is virtually removed; if j's grid cell is not
  a cavity then (not allowed, or another centre within R_c of its centre), rejected; else
  accepted with min(1, N exp(-beta dU) / (z V_cav')), V_cav' the cavity volume without j.

Derivation (Frenkel & Smit, Understanding Molecular Simulation, 2nd ed., ch. 5, for the
textbook rules this generalises). The grand canonical weight of N labelled molecules at r^N
is pi(r^N) ~ z^N / N! exp(-beta U(r^N)) d r^N. Let o be a state of N molecules and n = o plus
molecule N + 1 at r. The insertion proposes r with density alpha(o -> n) = 1 / (n_cav(o) v)
when r lies in a cavity cell of o (the cell uniformly, 1 / n_cav, then r uniformly in it,
1 / v) and 0 otherwise; the deletion proposes removing molecule N + 1 of n with probability
alpha(n -> o) = 1 / (N + 1) (the others relabelled as the engine does, which is a fixed
bijection). Detailed balance, pi(o) alpha(o -> n) acc(o -> n) = pi(n) alpha(n -> o) acc(n ->
o), gives

    acc(o -> n) / acc(n -> o) = [z / (N + 1) exp(-beta dU)] (N + 1) / (N + 1) n_cav(o) v
                              = z V_cav(o) exp(-beta dU) / (N + 1),

dU = U(n) - U(o), which the Metropolis choice min(1, .) satisfies both ways: the deletion
from n (N + 1 molecules) is accepted with min(1, (N + 1) exp(+beta dU) / (z V_cav(o))), and
o is n without the deleted molecule, whose cavity volume is exactly the V_cav' computed by
the virtual removal. Where alpha(o -> n) = 0 (r in no cavity of o, i.e. the deleted
molecule's cell is not a cavity once it is removed), the deletion must be rejected, which is
the cavity rule of the deletion. Both ways see the same grid cell of r (the same function
of r), so the pairing is exact. With V_cav = V (R_c = 0, no excluded cells) these are the
textbook rules.

Requirements checked at set-up: R_c > the half diagonal of a grid cell (a molecule always
counts in its own cell's occ), and every periodic edge > 2 (R_c + max g) (the stencil never
reaches a cell twice through the periodic images).

Layout: the compiled loop ``run_cavity_moves`` works on a :class:`gcmc.sampling.box.Box`'s
arrays (molecules, cells, energy, the engine's counters layout) plus the grid's arrays;
``run_moves`` of the engine is not touched, this module inlines its helpers (pair_energy,
trial_energy, add_molecule, remove_molecule, relocate_molecule, displacement_tail).

Status: validated in tests/test_cavity.py (ideal-gas Poisson N with cavities, bookkeeping,
the dense LJ fluid against plain GCMC); not used by builds. Measured on the filled slits in
benchmarks/README.md ("Cavity-biased exchange"): 11x (argon 3 sigma) and 7x (nitrogen 1.0 nm)
the accepted exchanges per CPU second of k = 64 biased insertion, but they are flickers (a
molecule inserted into one of the few cavities and deleted again): N stays frozen in every
preparation (212, 216, 222, 224 for argon), and the certificate is not met, alone or inside
the tempering chains (``box_class=CavityBox``).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np
from numba import njit

from gcmc.errors import InputError
from gcmc.physics.model import SLIT, PoreModel
from gcmc.physics.potentials import wall_potential_k
from gcmc.sampling import engine as E
from gcmc.sampling.box import Box, EngineOptions
from gcmc.sampling.engine import (
    C_DEL_ACC,
    C_DEL_TRY,
    C_DISP_ACC,
    C_DISP_TRY,
    C_INS_ACC,
    C_INS_TRY,
    F_BETA,
    F_DMAX,
    F_LX,
    F_LY,
    F_LZ,
    F_MAX_BETA_U,
    F_P_DISPLACE,
    F_VOLUME,
    F_ZV,
    I_N,
    I_NBINS,
    I_SLAB,
    I_SLIT,
    MOVE_FASTMATH,
    add_molecule,
    cell_of,
    displacement_tail,
    pair_energy,
    relocate_molecule,
    remove_molecule,
    trial_energy,
    wall_energy,
    zbin_of,
)
from gcmc.sampling.rng import below, seed_state, uniform

# gpar (float) indices: grid cell edges, their inverses, R_c^2, cell volume
G_GX, G_GY, G_GZ, G_IGX, G_IGY, G_IGZ, G_RC2, G_VCELL = 0, 1, 2, 3, 4, 5, 6, 7
N_GPAR = 8
# gip (int) indices: cells per edge, cavities now, z periodic
J_NX, J_NY, J_NZ, J_NCAV, J_PERZ = 0, 1, 2, 3, 4
N_GIP = 5
# extra counters: insertions with no cavity, deletions rejected by the cavity rule
X_INS_NOCAV, X_DEL_NOTCAV = 0, 1
N_XCOUNTERS = 2


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def grid_cell_of(x, y, z, gp, gi):
    """Index of the grid cell holding (x, y, z) (nm), clamped into the grid."""
    ix, iy, iz = _home_cell(x, y, z, gp, gi)
    return (iz * gi[J_NY] + iy) * gi[J_NX] + ix


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def _home_cell(x, y, z, gp, gi):
    """The grid indices of the cell holding (x, y, z), clamped to the grid."""
    ix0 = min(max(int(x * gp[G_IGX]), 0), gi[J_NX] - 1)
    iy0 = min(max(int(y * gp[G_IGY]), 0), gi[J_NY] - 1)
    iz0 = min(max(int(z * gp[G_IGZ]), 0), gi[J_NZ] - 1)
    return ix0, iy0, iz0


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def _stencil_cell(k, ix0, iy0, iz0, x, y, z, gp, gi, stencil):
    """The flat index of stencil cell ``k`` around the home cell when its centre lies within
    R_c of (x, y, z) (the distance to the centre of the unwrapped cell: the nearest image,
    edges > 2 R_c), wrapped periodically; -1 when it does not, or lies beyond a wall."""
    nx = gi[J_NX]
    ny = gi[J_NY]
    nz = gi[J_NZ]
    jx = ix0 + stencil[k, 0]
    jy = iy0 + stencil[k, 1]
    jz = iz0 + stencil[k, 2]
    dx = x - (jx + 0.5) * gp[G_GX]
    dy = y - (jy + 0.5) * gp[G_GY]
    dz = z - (jz + 0.5) * gp[G_GZ]
    if dx * dx + dy * dy + dz * dz >= gp[G_RC2]:
        return -1
    if jz < 0 or jz >= nz:
        if gi[J_PERZ] != 1:
            return -1
        jz = jz + nz if jz < 0 else jz - nz
    if jx < 0:
        jx += nx
    elif jx >= nx:
        jx -= nx
    if jy < 0:
        jy += ny
    elif jy >= ny:
        jy -= ny
    return (jz * ny + jy) * nx + jx


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def occupy(x, y, z, delta, gp, gi, stencil, allowed, occ, cav_list, cav_pos):
    """Add ``delta`` (+1 or -1) to occ of every grid cell whose centre is within R_c of (x, y,
    z), keeping the cavity list (allowed cells with occ == 0) and n_cav up to date."""
    ix0, iy0, iz0 = _home_cell(x, y, z, gp, gi)
    for k in range(stencil.shape[0]):
        c = _stencil_cell(k, ix0, iy0, iz0, x, y, z, gp, gi, stencil)
        if c < 0:
            continue
        old = occ[c]
        occ[c] = old + delta
        if allowed[c] == 0:
            continue
        if delta < 0 and old == 1:  # became a cavity: append
            m = gi[J_NCAV]
            cav_list[m] = c
            cav_pos[c] = m
            gi[J_NCAV] = m + 1
        elif delta > 0 and old == 0:  # no longer a cavity: swap-remove
            m = gi[J_NCAV] - 1
            p = cav_pos[c]
            last = cav_list[m]
            cav_list[p] = last
            cav_pos[last] = p
            cav_pos[c] = -1
            gi[J_NCAV] = m


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def freed_cells(x, y, z, gp, gi, stencil, allowed, occ):
    """Allowed grid cells that would become cavities if the molecule at (x, y, z) were
    removed: those within R_c of it with occ == 1 (it is their only centre)."""
    ix0, iy0, iz0 = _home_cell(x, y, z, gp, gi)
    count = 0
    for k in range(stencil.shape[0]):
        c = _stencil_cell(k, ix0, iy0, iz0, x, y, z, gp, gi, stencil)
        if c >= 0 and occ[c] == 1 and allowed[c] != 0:
            count += 1
    return count


@njit(cache=True, error_model="numpy", boundscheck=False)
def build_occupancy(ip, cell_xyz, pid_cell, pid_slot, gp, gi, stencil, allowed, occ, cav_list,
                    cav_pos):  # fmt: skip
    """occ, the cavity list and n_cav from scratch for the molecules in the box (the same
    update as the moves use, applied to an empty grid)."""
    occ[:] = 0
    cav_pos[:] = -1
    m = 0
    for c in range(occ.shape[0]):
        if allowed[c] != 0:
            cav_list[m] = c
            cav_pos[c] = m
            m += 1
    gi[J_NCAV] = m
    for i in range(ip[I_N]):
        c = pid_cell[i]
        s = pid_slot[i]
        occupy(cell_xyz[c, 0, s], cell_xyz[c, 1, s], cell_xyz[c, 2, s], 1, gp, gi, stencil,
               allowed, occ, cav_list, cav_pos)  # fmt: skip


@njit(cache=True, fastmath=MOVE_FASTMATH, error_model="numpy", boundscheck=False, _nrt=False)
def run_cavity_moves(
    n_moves,
    sample_every,
    fp,
    ip,
    cell_xyz,
    cell_n,
    cell_pid,
    pid_cell,
    pid_slot,
    nbr,
    nbr_n,
    zbin_n,
    tail_table,
    rng,
    energy,
    counters,
    xcounters,
    gp,
    gi,
    stencil,
    allowed,
    occ,
    cav_list,
    cav_pos,
    out_n,
    out_uff,
    out_usf,
    out_start,
    profile,
):
    """Run n_moves moves (module docstring). Every sample_every moves record N, U_ff, U_sf at
    out_*[out_start + k] and add the z-bin counts to ``profile``. Returns samples written.
    ``counters`` in the engine's layout; ``xcounters``: insertions tried with no cavity,
    deletions rejected by the cavity rule. Called from Python only (the engine's rule for
    reproducible builds, DEVELOPERS.md); the engine's helpers are inlined."""
    lx = fp[F_LX]
    ly = fp[F_LY]
    lz = fp[F_LZ]
    beta = fp[F_BETA]
    z_act = fp[F_ZV] / fp[F_VOLUME]
    dmax = fp[F_DMAX]
    p_disp = fp[F_P_DISPLACE]
    max_bu = fp[F_MAX_BETA_U]
    slit = ip[I_SLIT] == 1
    nbins = ip[I_NBINS]
    vcell = gp[G_VCELL]
    gx = gp[G_GX]
    gy = gp[G_GY]
    gz = gp[G_GZ]
    nx = gi[J_NX]
    ny = gi[J_NY]
    written = 0
    for move in range(n_moves):
        n = ip[I_N]
        r = uniform(rng)
        if r < p_disp:
            # ---- displacement (the engine's), then the grid update
            if n > 0:
                counters[C_DISP_TRY] += 1
                i = below(rng, n)
                c = pid_cell[i]
                s = pid_slot[i]
                x0 = cell_xyz[c, 0, s]
                y0 = cell_xyz[c, 1, s]
                z0 = cell_xyz[c, 2, s]
                x1 = E._wrap(x0 + dmax * (2.0 * uniform(rng) - 1.0), lx)
                y1 = E._wrap(y0 + dmax * (2.0 * uniform(rng) - 1.0), ly)
                z1 = z0 + dmax * (2.0 * uniform(rng) - 1.0)
                ok = True
                if slit:
                    if z1 <= 0.0 or z1 >= lz:
                        ok = False
                else:
                    z1 = E._wrap(z1, lz)
                usf1 = 0.0
                if ok:
                    usf1 = wall_energy(z1, fp, ip)
                    if usf1 * beta > max_bu:
                        ok = False
                c1 = c
                uff1 = 0.0
                if ok:
                    c1 = cell_of(x1, y1, z1, fp, ip)
                    uff1, ov = pair_energy(
                        x1, y1, z1, c1, c, s, fp, ip, cell_xyz, cell_n, nbr, nbr_n
                    )
                    if ov:
                        ok = False
                if ok:
                    uff0, _ = pair_energy(x0, y0, z0, c, c, s, fp, ip, cell_xyz, cell_n, nbr, nbr_n)
                    usf0 = wall_energy(z0, fp, ip)
                    dtail = 0.0
                    b0 = zbin_of(z0, fp, ip)
                    b1 = zbin_of(z1, fp, ip)
                    if slit and ip[I_SLAB] == 1 and b0 != b1:
                        dtail = displacement_tail(b0, b1, zbin_n, tail_table, nbins)
                    dff = uff1 - uff0 + dtail
                    dsf = usf1 - usf0
                    du = dff + dsf
                    if du <= 0.0 or uniform(rng) < math.exp(-beta * du):
                        counters[C_DISP_ACC] += 1
                        energy[E.E_FF] += dff
                        energy[E.E_SF] += dsf
                        relocate_molecule(
                            i, c, s, c1, x1, y1, z1, b0, b1, ip, fp, cell_xyz, cell_n,
                            cell_pid, pid_cell, pid_slot, zbin_n,
                        )  # fmt: skip
                        occupy(x0, y0, z0, -1, gp, gi, stencil, allowed, occ, cav_list, cav_pos)
                        occupy(x1, y1, z1, 1, gp, gi, stencil, allowed, occ, cav_list, cav_pos)
        elif uniform(rng) < 0.5:
            # ---- insertion into a cavity
            counters[C_INS_TRY] += 1
            ncav = gi[J_NCAV]
            if ncav == 0:
                xcounters[X_INS_NOCAV] += 1
            else:
                cg = cav_list[below(rng, ncav)]
                ix = cg % nx
                iy = (cg // nx) % ny
                iz = cg // (nx * ny)
                x = (ix + uniform(rng)) * gx
                y = (iy + uniform(rng)) * gy
                z = (iz + uniform(rng)) * gz
                ok = grid_cell_of(x, y, z, gp, gi) == cg and x < lx and y < ly
                if slit and (z <= 0.0 or z >= lz):
                    ok = False
                if not slit and z >= lz:
                    ok = False
                if ok:
                    dff, dsf, ov = trial_energy(
                        x, y, z, -1, -1, n, -1, fp, ip, cell_xyz, cell_n, nbr, nbr_n, zbin_n,
                        tail_table,
                    )  # fmt: skip
                    if not ov:
                        bu = beta * (dff + dsf)
                        acc = z_act * ncav * vcell / (n + 1.0) * math.exp(-bu)
                        if acc >= 1.0 or uniform(rng) < acc:
                            counters[C_INS_ACC] += 1
                            energy[E.E_FF] += dff
                            energy[E.E_SF] += dsf
                            add_molecule(
                                x, y, z, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot,
                                zbin_n,
                            )  # fmt: skip
                            occupy(x, y, z, 1, gp, gi, stencil, allowed, occ, cav_list, cav_pos)
        else:
            # ---- deletion: the molecule's cell must be a cavity without it
            counters[C_DEL_TRY] += 1
            if n > 0:
                i = below(rng, n)
                c = pid_cell[i]
                s = pid_slot[i]
                x0 = cell_xyz[c, 0, s]
                y0 = cell_xyz[c, 1, s]
                z0 = cell_xyz[c, 2, s]
                cg = grid_cell_of(x0, y0, z0, gp, gi)
                # the molecule is within R_c of its own cell's centre (R_c > half diagonal):
                # occ == 1 means no other centre is
                if allowed[cg] == 0 or occ[cg] != 1:
                    xcounters[X_DEL_NOTCAV] += 1
                else:
                    b0 = zbin_of(z0, fp, ip)
                    dff0, dsf0, _ = trial_energy(
                        x0, y0, z0, c, s, n - 1, b0, fp, ip, cell_xyz, cell_n, nbr, nbr_n,
                        zbin_n, tail_table,
                    )  # fmt: skip
                    ncav1 = gi[J_NCAV] + freed_cells(x0, y0, z0, gp, gi, stencil, allowed, occ)
                    acc = n * math.exp(beta * (dff0 + dsf0)) / (z_act * ncav1 * vcell)
                    if acc >= 1.0 or uniform(rng) < acc:
                        counters[C_DEL_ACC] += 1
                        energy[E.E_FF] -= dff0
                        energy[E.E_SF] -= dsf0
                        remove_molecule(
                            i, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n
                        )
                        occupy(x0, y0, z0, -1, gp, gi, stencil, allowed, occ, cav_list, cav_pos)
        if sample_every > 0 and (move + 1) % sample_every == 0:
            k = out_start + written
            out_n[k] = ip[I_N]
            out_uff[k] = energy[E.E_FF]
            out_usf[k] = energy[E.E_SF]
            for b in range(nbins):
                profile[b] += zbin_n[b]
            written += 1
    return written


# ---------------------------------------------------------------------------------------
# Python side


@dataclass(frozen=True)
class CavityOptions:
    """The grid of the cavity-biased exchange.

    ``grid_sigma``: grid cell edge (in probe sigma; each box edge holds a whole number of
    cells, the nearest to L / (grid_sigma sigma)); ``cavity_radius_sigma``: R_c, in sigma (a
    cavity has no molecule centre within R_c of its centre; below the nearest-neighbour
    distance of the dense phase, 1.11 sigma for a close-packed LJ layer, so that a vacancy
    is a cavity); ``wall_cutoff_beta_u``: slit cells with beta V_wall above this are never
    cavities (module docstring).
    """

    grid_sigma: float = 0.2
    cavity_radius_sigma: float = 0.8
    wall_cutoff_beta_u: float = 40.0

    def validate(self) -> None:
        """One-line InputError naming the field and the problem."""
        if not self.grid_sigma > 0.0:
            raise InputError(f"grid_sigma: {self.grid_sigma} must be > 0")
        if not self.cavity_radius_sigma > 0.0:
            raise InputError(f"cavity_radius_sigma: {self.cavity_radius_sigma} must be > 0")
        if not self.wall_cutoff_beta_u > 0.0:
            raise InputError(f"wall_cutoff_beta_u: {self.wall_cutoff_beta_u} must be > 0")


def _stencil(g: tuple[float, float, float], rc: float) -> np.ndarray:
    """Offsets of the grid cells whose centre can lie within rc of a point of the home cell."""
    reach = [int(math.ceil(rc / gi + 0.5)) + 1 for gi in g]
    out = []
    for dz in range(-reach[2], reach[2] + 1):
        for dy in range(-reach[1], reach[1] + 1):
            for dx in range(-reach[0], reach[0] + 1):
                d2 = 0.0
                for d, gi in zip((dx, dy, dz), g, strict=True):
                    # nearest distance from [0, g] to the offset cell's centre (d + 0.5) g
                    c = (d + 0.5) * gi
                    gap = c - gi if c > gi else (-c if c < 0.0 else 0.0)
                    d2 += gap * gap
                if d2 < rc * rc * (1.0 + 1e-12):
                    out.append((dx, dy, dz))
    out.sort(key=lambda t: t[0] ** 2 + t[1] ** 2 + t[2] ** 2)
    return np.array(out, dtype=np.int64).reshape(-1, 3)


class CavityBox(Box):
    """A :class:`gcmc.sampling.box.Box` whose moves are the cavity-biased ones: the same
    constructor (plus ``cavity``, the grid's options) and the same :meth:`run`, so that any
    driver of Boxes (e.g. the tempering chains of gcmc.sampling.tempering, through their
    ``box_class``) runs them. The grid's excluded wall cells are fixed at construction, at
    ``temperature_k`` (module docstring: any fixed choice keeps the moves exact)."""

    def __init__(
        self,
        model: PoreModel,
        temperature_k: float,
        activity_nm3: float,
        options: EngineOptions | None = None,
        rng_state: np.ndarray | None = None,
        max_displacement_nm: float | None = None,
        cavity: CavityOptions | None = None,
    ):
        self.cavity_options = cavity or CavityOptions()
        self.cavity_options.validate()
        super().__init__(
            model, temperature_k, activity_nm3, options, rng_state, max_displacement_nm
        )
        o = self.cavity_options
        sig = model.probe.sigma_nm
        lengths = model.box_lengths_nm
        counts = [max(1, round(length / (o.grid_sigma * sig))) for length in lengths]
        g = tuple(length / k for length, k in zip(lengths, counts, strict=True))
        rc = o.cavity_radius_sigma * sig
        half_diag = 0.5 * math.sqrt(sum(x * x for x in g))
        if not rc > half_diag:
            raise InputError(
                f"cavity_radius_sigma: {o.cavity_radius_sigma} must exceed the half diagonal "
                f"of a grid cell ({half_diag / sig:.3f} sigma)"
            )
        slit = model.geometry == SLIT
        periodic = lengths[:2] if slit else lengths
        if min(periodic) <= 2.0 * (rc + max(g)):
            raise InputError(
                f"cavity_radius_sigma: {o.cavity_radius_sigma} too large for the box "
                f"(periodic edges must exceed 2 (R_c + g))"
            )
        self.grid_counts = tuple(int(k) for k in counts)
        self.gp = np.zeros(N_GPAR)
        self.gp[G_GX : G_GZ + 1] = g
        self.gp[G_IGX : G_IGZ + 1] = [1.0 / x for x in g]
        self.gp[G_RC2] = rc * rc
        self.gp[G_VCELL] = g[0] * g[1] * g[2]
        self.gi = np.zeros(N_GIP, dtype=np.int64)
        self.gi[J_NX : J_NZ + 1] = counts
        self.gi[J_PERZ] = 0 if slit else 1
        self.stencil = _stencil(g, rc)
        ncell = counts[0] * counts[1] * counts[2]
        allowed = np.ones(counts[2], dtype=np.int8)
        if slit:
            zc = (np.arange(counts[2]) + 0.5) * g[2]
            beta = 1.0 / float(temperature_k)
            lo = np.clip(zc - 0.5 * g[2], 1e-6 * g[2], lengths[2] - 1e-6 * g[2])
            hi = np.clip(zc + 0.5 * g[2], 1e-6 * g[2], lengths[2] - 1e-6 * g[2])
            bu = beta * np.minimum(
                wall_potential_k(model, zc),
                np.minimum(wall_potential_k(model, lo), wall_potential_k(model, hi)),
            )
            allowed = (bu <= o.wall_cutoff_beta_u).astype(np.int8)
        # cells are indexed (iz * ny + iy) * nx + ix: a z layer is a contiguous run
        self.allowed = np.repeat(allowed, counts[0] * counts[1])
        self.occ = np.zeros(ncell, dtype=np.int64)
        self.cav_list = np.zeros(ncell, dtype=np.int64)
        self.cav_pos = np.full(ncell, -1, dtype=np.int64)
        self.xcounters = np.zeros(N_XCOUNTERS, dtype=np.int64)
        self.rebuild_grid()

    # -- state --------------------------------------------------------------------------
    @property
    def n_cavities(self) -> int:
        """Cavity cells now."""
        return int(self.gi[J_NCAV])

    @property
    def cavity_volume_nm3(self) -> float:
        """V_cav = n_cav v now (nm^3)."""
        return self.n_cavities * float(self.gp[G_VCELL])

    @property
    def cell_volume_nm3(self) -> float:
        """Volume of one grid cell (nm^3)."""
        return float(self.gp[G_VCELL])

    def rebuild_grid(self) -> None:
        """occ, the cavity list and n_cav from the configuration (after loading one)."""
        b = self
        build_occupancy(
            b.ip, b.cell_xyz, b.pid_cell, b.pid_slot, self.gp, self.gi, self.stencil,
            self.allowed, self.occ, self.cav_list, self.cav_pos,
        )  # fmt: skip

    def load_positions(self, positions: np.ndarray) -> int:
        """Replace the configuration (overlaps dropped, energy and grid recomputed); returns
        the number of molecules loaded."""
        n = super().load_positions(positions)
        self.rebuild_grid()
        return n

    # -- moves --------------------------------------------------------------------------
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
        """Run n_moves moves, sampling every sample_every (0: none); returns samples written."""
        if out_n is None or out_uff is None or out_usf is None:
            out_n = np.zeros(1, dtype=np.int64)
            out_uff = np.zeros(1)
            out_usf = np.zeros(1)
            sample_every = 0
        if profile is None:
            profile = np.zeros(self.n_bins)
        b = self
        return run_cavity_moves(
            int(n_moves), int(sample_every), b.fp, b.ip, b.cell_xyz, b.cell_n, b.cell_pid,
            b.pid_cell, b.pid_slot, b.nbr, b.nbr_n, b.zbin_n, b.tail_table, b.rng, b.energy,
            b.counters, self.xcounters, self.gp, self.gi, self.stencil, self.allowed, self.occ,
            self.cav_list, self.cav_pos, out_n, out_uff, out_usf, int(out_start), profile,
        )  # fmt: skip

    def equilibrate(self, n_moves: int, chunks: int = 20) -> None:
        """Run n_moves moves in ``chunks`` parts, adapting the maximum displacement after each
        towards 40 % acceptance (gcmc.sampling.point.adapted_step)."""
        from gcmc.sampling.point import adapted_step

        b = self
        sig = b.model.probe.sigma_nm
        lmax = 0.5 * min(b.model.box_lengths_nm)
        per = max(1, int(n_moves) // max(1, int(chunks)))
        done = 0
        while done < n_moves:
            step = min(per, int(n_moves) - done)
            saved = b.counters.copy()
            b.counters[:] = 0
            self.run(step)
            a = b.acceptance()["displacement"]
            b.counters += saved
            if math.isfinite(a):
                b.max_displacement_nm = adapted_step(b.max_displacement_nm, a, sig, lmax)
            done += step

    def reset_counters(self) -> None:
        """Zero the move counters (the engine's and the cavity rule's)."""
        super().reset_counters()
        self.xcounters[:] = 0

    @property
    def box(self) -> CavityBox:
        """The box itself (the sampler is a Box)."""
        return self


class CavitySampler(CavityBox):
    """A :class:`CavityBox` built with the cavity options first: cavity-biased grand
    canonical moves at (T, z)."""

    def __init__(
        self,
        model: PoreModel,
        temperature_k: float,
        activity_nm3: float,
        options: CavityOptions | None = None,
        engine_options: EngineOptions | None = None,
        rng_state: np.ndarray | None = None,
        max_displacement_nm: float | None = None,
    ):
        super().__init__(
            model, temperature_k, activity_nm3, engine_options, rng_state, max_displacement_nm,
            cavity=options,
        )  # fmt: skip


@dataclass
class CavityRun:
    """What :func:`sample_cavity` measured in production."""

    n: np.ndarray  # N every sample_every moves
    uff: np.ndarray  # U_ff (K) at the same samples
    usf: np.ndarray  # U_sf (K)
    profile: np.ndarray  # mean molecules per z bin
    acceptance: dict[str, float]
    exchanges: int  # accepted insertions + deletions in production
    cpu_s: float  # process time of the production
    sampler: CavitySampler


def sample_cavity(
    model: PoreModel,
    temperature_k: float,
    activity_nm3: float,
    production_moves: int,
    sample_every: int = 100,
    seed: np.random.SeedSequence | int = 0,
    equilibration_moves: int = 0,
    start: np.ndarray | None = None,
    options: CavityOptions | None = None,
    engine_options: EngineOptions | None = None,
    overfill_factor: float = 0.0,
) -> CavityRun:
    """Cavity-biased GCMC at (T, z): optional start configuration; with ``overfill_factor``
    > 0 the first half of the equilibration runs at that multiple of z; equilibration adapts
    the step; then ``production_moves`` moves sampled every ``sample_every``."""
    if int(production_moves) < int(sample_every) or int(sample_every) < 1:
        raise InputError("production_moves: must be at least sample_every (>= 1)")
    s = CavitySampler(model, temperature_k, activity_nm3, options, engine_options, seed_state(seed))
    if start is not None and len(start):
        s.load_positions(start)
    eq = int(equilibration_moves)
    if overfill_factor > 0.0 and eq > 0:
        s.activity_nm3 = activity_nm3 * overfill_factor
        s.equilibrate(eq // 2)
        s.activity_nm3 = activity_nm3
        s.equilibrate(eq - eq // 2)
    elif eq > 0:
        s.equilibrate(eq)
    s.reset_counters()
    ns = int(production_moves) // int(sample_every)
    n = np.zeros(ns, dtype=np.int64)
    uff = np.zeros(ns)
    usf = np.zeros(ns)
    prof = np.zeros(s.n_bins)
    t = time.process_time()
    w = s.run(ns * int(sample_every), int(sample_every), n, uff, usf, 0, prof)
    cpu = time.process_time() - t
    return CavityRun(
        n=n[:w],
        uff=uff[:w],
        usf=usf[:w],
        profile=prof / max(w, 1),
        acceptance=s.acceptance(),
        exchanges=s.exchanges,
        cpu_s=cpu,
        sampler=s,
    )
