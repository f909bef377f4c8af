"""The compiled GCMC engine: cell structure, energies and the move loop (numba, nopython).

Units: nm and kelvin; energies are E/k in K; beta = 1/T in 1/K; the activity z = beta*f in
molecules/nm^3.

Data layout (all arrays owned by a :class:`gcmc.sampling.box.Box`):

- ``cell_xyz[c, 0:3, slot]``: coordinates of the molecules of cell ``c``, contiguous per cell
  and per axis so that the pair loop over a cell is a unit-stride, branch-free, vectorisable
  loop; ``cell_n[c]`` molecules in cell ``c``; ``cell_pid[c, slot]`` their molecule index.
- ``pid_cell[i]``, ``pid_slot[i]``: where molecule ``i`` (0 <= i < N) lives.
- ``nbr[c, :nbr_n[c]]``: the distinct cells within the cutoff of cell ``c`` (including ``c``).
- ``zbin_n[b]``: molecules per z bin: the instantaneous density profile, used by the slab tail
  correction in slit pores (``tail_table``) and accumulated as the density profile.

Cell capacity never overflows: no two molecules are ever closer than the overlap distance
(moves that would make them so are rejected as overlaps), so a cell of side a holds at most
sqrt(2) (a + r_ov)^3 / r_ov^3 molecules (close packing); the capacity is that bound plus 8,
so the pair loop may read a cell's slots up to the next multiple of 8 (stale or zero values,
masked out).

Speed (benchmarks/README.md, "Engine speed"): the helpers are inlined at the numba IR level
into one move loop, ``run_moves``, compiled without the reference-counting runtime
(``_nrt=False``: it only borrows the caller's arrays), so the pair sums of a move run
without calls or atomic refcount updates (the slab-tail sum stays a call: it keeps its own
fastmath); the neighbour
lists run nearest cells first, so the overlap test of a trial position usually stops in the
home cell.

The moves are the grand canonical ones with Metropolis acceptance (Norman & Filinov 1969;
Frenkel & Smit, Understanding Molecular Simulation, 2nd ed., ch. 5):
displacement min(1, exp(-beta dU)); insertion with k trial positions (k = 1: plain insertion)
min(1, z V W / (k (N+1))) with W = sum_j exp(-beta dU_j), the chosen trial drawn with
probability exp(-beta dU_j)/W; deletion of a random molecule i with k - 1 further trial
positions in the configuration without i: min(1, k N / (z V W')), W' = exp(-beta dU_i) +
sum_{j<k} exp(-beta dU_j). For k = 1 these are the textbook rules; for k > 1 they are the
single-site Rosenbluth (configurational-bias) rules, which satisfy detailed balance exactly
(the reverse of an insertion is a deletion whose k trials include the inserted position).
"""

from __future__ import annotations

import math

import llvmlite.binding as _llvm
import numpy as np
from numba import njit

from gcmc.sampling.rng import below, uniform

# LLVM's loop vectoriser interleaves the pair loop by default (8 lanes x up to 4 copies = 32
# slots per vector iteration); a cell holds 2-30 molecules (its slots padded to a multiple of
# 8), so most cells then ran in the loop's remainder. One vector of 8 per iteration keeps every
# cell in whole vectors: +10-15 % in the states with short cells, numba/C from 0.87-0.90 to
# 1.02-1.05 (benchmarks/README.md, "Engine speed"). The option is process-wide and applies to
# what numba compiles after this import (the engine compiles lazily, at its first call); it
# changes speed, not semantics. A cache compiled without it is invalidated with this file.
_llvm.set_option("", "-force-vector-interleave=1")

# fparams indices
F_LX, F_LY, F_LZ = 0, 1, 2
F_INV_CX, F_INV_CY, F_INV_CZ = 3, 4, 5
F_RC2, F_SIG2, F_EPS4 = 6, 7, 8
F_BETA, F_ZV = 9, 10
F_WALL_PRE, F_SIG_SF, F_DELTA = 11, 12, 13
F_LRC_C = 14  # homogeneous tail: U_tail = N^2 c / V (bulk)
F_VOLUME = 15
F_DMAX = 16
F_P_DISPLACE = 17
F_ROV2 = 18  # overlap distance squared
F_INV_DZ = 19  # 1 / z-bin width
F_SLAB_C = 20  # slab tail: constant pair term phi(r_c)/A for |dz| < r_c
F_MAX_BETA_U = 21
N_FPARAMS = 22

# iparams indices
I_NCX, I_NCY, I_NCZ = 0, 1, 2
I_N = 3
I_SLIT = 4
I_KTRIALS = 5
I_NBINS = 6
I_SLAB = 7
N_IPARAMS = 8

# counters indices
C_DISP_TRY, C_DISP_ACC, C_INS_TRY, C_INS_ACC, C_DEL_TRY, C_DEL_ACC = 0, 1, 2, 3, 4, 5
N_COUNTERS = 6

#: Added to a cell's pair sum for each pair closer than the overlap distance (see pair_energy).
OVERLAP_FLAG = 1.0e100
#: Floating-point flags of the move loop (and of the pair loop inlined into it): reassociation
#: lets the pair sums vectorise; no finite-math assumptions (acceptance ratios may be inf).
MOVE_FASTMATH = {"reassoc", "nsz", "arcp", "contract"}

# energy indices: fluid-fluid (pairs within r_c, plus tails) and solid-fluid
E_FF, E_SF = 0, 1


@njit(cache=True, fastmath=MOVE_FASTMATH, error_model="numpy", boundscheck=False, inline="always")
def pair_energy(x, y, z, c_home, skip_cell, skip_slot, fp, ip, cell_xyz, cell_n, nbr, nbr_n):
    """LJ energy (K) of a molecule at (x, y, z) in cell c_home with all molecules within r_c,
    skipping the one at (skip_cell, skip_slot) (itself, when it is already in the box).

    Returns (energy, overlap). overlap is True if any pair is closer than the overlap
    distance; the energy is then meaningless and the move is rejected.

    Each cell's loop runs over its slots rounded up to a multiple of 8 (the capacity leaves
    room, see the module docstring), the padding and the skipped slot masked by a select, so
    that it compiles to whole SIMD vectors without a scalar remainder. An overlapping pair
    adds OVERLAP_FLAG to the cell's sum (a sum of non-overlapping pairs is many orders of
    magnitude smaller), so one reduction per cell gives both the energy and the overlap test.
    Inlined (numba IR) into its callers; the move loop carries the reassociation flags the
    vectorised sums need (MOVE_FASTMATH).
    """
    lx = fp[F_LX]
    ly = fp[F_LY]
    lz = fp[F_LZ]
    ilx = 1.0 / lx
    ily = 1.0 / ly
    ilz = 1.0 / lz
    rc2 = fp[F_RC2]
    sig2 = fp[F_SIG2]
    rov2 = fp[F_ROV2]
    periodic_z = 1.0 - float(ip[I_SLIT])
    acc = 0.0
    for k in range(nbr_n[c_home]):
        c = nbr[c_home, k]
        n = cell_n[c]
        if n == 0:
            continue
        skip = (skip_slot + 1) * np.int64(c == skip_cell) - 1  # -1: nothing to skip
        e = 0.0
        for j in range((n + 7) & -8):
            dx = x - cell_xyz[c, 0, j]
            dy = y - cell_xyz[c, 1, j]
            dz = z - cell_xyz[c, 2, j]
            dx -= lx * np.floor(dx * ilx + 0.5)
            dy -= ly * np.floor(dy * ily + 0.5)
            dz -= periodic_z * lz * np.floor(dz * ilz + 0.5)
            r2 = dx * dx + dy * dy + dz * dz
            r2 = 1.0e30 if ((j == skip) | (j >= n)) else r2
            s2 = sig2 / r2
            s6 = s2 * s2 * s2
            # an overlapping pair contributes the flag only (its LJ term may be inf or NaN:
            # r = 0 for coincident molecules), a pair beyond r_c nothing
            e += OVERLAP_FLAG if r2 < rov2 else ((s6 * s6 - s6) if r2 < rc2 else 0.0)
        if e >= 0.5 * OVERLAP_FLAG:
            return 0.0, True
        acc += e
    return fp[F_EPS4] * acc, False


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def cell_of(x, y, z, fp, ip):
    """Index of the cell holding position (x, y, z) (nm); z clamped into the box."""
    ix = min(int(x * fp[F_INV_CX]), ip[I_NCX] - 1)
    iy = min(int(y * fp[F_INV_CY]), ip[I_NCY] - 1)
    iz = min(max(int(z * fp[F_INV_CZ]), 0), ip[I_NCZ] - 1)
    return (iz * ip[I_NCY] + iy) * ip[I_NCX] + ix


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def zbin_of(z, fp, ip):
    """Index of the density-profile bin of height z (nm), clamped."""
    return min(max(int(z * fp[F_INV_DZ]), 0), ip[I_NBINS] - 1)


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def wall_energy(z, fp, ip):
    """Energy (K) of one molecule at height z (nm) from both slit walls; 0 in bulk."""
    if ip[I_SLIT] == 0:
        return 0.0
    return _slit_wall(z, fp[F_LZ], fp[F_WALL_PRE], fp[F_SIG_SF], fp[F_DELTA])


@njit(cache=True, error_model="numpy", inline="always")
def _steele(z, pre, s, d):
    sz2 = (s / z) ** 2
    sz4 = sz2 * sz2
    t = z + 0.61 * d
    return pre * (0.4 * sz4 * sz4 * sz2 - sz4 - s**4 / (3.0 * d * t * t * t))


@njit(cache=True, error_model="numpy", inline="always")
def _slit_wall(z, h, pre, s, d):
    return _steele(z, pre, s, d) + _steele(h - z, pre, s, d)


@njit(cache=True, fastmath=True, error_model="numpy", boundscheck=False)
def slab_tail_sum(b, zbin_n, tail_table, nbins):
    """sum_b' n_b' T[|b - b'|]: tail energy of a molecule in bin b with the profile beyond r_c."""
    # two contiguous runs, bins at and below b and bins above; unsigned indices (all are >= 0)
    # spare the negative-index wraparound, which would turn the loads into gathers
    acc = 0.0
    for bb in range(b + 1):
        acc += zbin_n[np.uint64(b - bb)] * tail_table[bb]
    for bb in range(1, nbins - b):
        acc += zbin_n[np.uint64(b + bb)] * tail_table[bb]
    return acc


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def insertion_tail(b, n_now, fp, ip, zbin_n, tail_table):
    """Tail energy gained by adding one molecule in z bin b to n_now molecules."""
    if ip[I_SLIT] == 0:
        return (2.0 * n_now + 1.0) * fp[F_LRC_C] / fp[F_VOLUME]
    if ip[I_SLAB] == 0:
        return 0.0
    return fp[F_SLAB_C] * n_now + slab_tail_sum(b, zbin_n, tail_table, ip[I_NBINS])


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def trial_energy(
    x,
    y,
    z,
    skip_cell,
    skip_slot,
    n_others,
    skip_bin,
    fp,
    ip,
    cell_xyz,
    cell_n,
    nbr,
    nbr_n,
    zbin_n,
    tail_table,
):
    """Energy of adding a molecule at (x, y, z) to the box, the molecule at (skip_cell,
    skip_slot, skip_bin) excluded (skip_cell = -1: none). Returns (d_ff, d_sf, overlap)."""
    usf = wall_energy(z, fp, ip)
    if usf * fp[F_BETA] > fp[F_MAX_BETA_U]:
        return 0.0, 0.0, True
    c = cell_of(x, y, z, fp, ip)
    uff, ov = pair_energy(x, y, z, c, skip_cell, skip_slot, fp, ip, cell_xyz, cell_n, nbr, nbr_n)
    if ov:
        return 0.0, 0.0, True
    b = zbin_of(z, fp, ip)
    tail = insertion_tail(b, n_others, fp, ip, zbin_n, tail_table)
    if skip_cell >= 0 and ip[I_SLIT] == 1 and ip[I_SLAB] == 1:
        d = b - skip_bin
        if d < 0:
            d = -d
        tail -= tail_table[d]  # the excluded molecule is still in the profile: drop its term
    return uff + tail, usf, False


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def add_molecule(x, y, z, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n):
    """Append a molecule at (x, y, z) to the cell lists and the z profile (no energy)."""
    i = ip[I_N]
    c = cell_of(x, y, z, fp, ip)
    s = cell_n[c]
    cell_xyz[c, 0, s] = x
    cell_xyz[c, 1, s] = y
    cell_xyz[c, 2, s] = z
    cell_pid[c, s] = i
    cell_n[c] = s + 1
    pid_cell[i] = c
    pid_slot[i] = s
    zbin_n[zbin_of(z, fp, ip)] += 1
    ip[I_N] = i + 1


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def remove_molecule(i, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n):
    """Remove molecule ``i`` from the cell lists and the z profile; the last molecule takes
    its id (no energy)."""
    c = pid_cell[i]
    s = pid_slot[i]
    zbin_n[zbin_of(cell_xyz[c, 2, s], fp, ip)] -= 1
    last = cell_n[c] - 1
    if s != last:  # move the cell's last molecule into the hole
        cell_xyz[c, 0, s] = cell_xyz[c, 0, last]
        cell_xyz[c, 1, s] = cell_xyz[c, 1, last]
        cell_xyz[c, 2, s] = cell_xyz[c, 2, last]
        j = cell_pid[c, last]
        cell_pid[c, s] = j
        pid_slot[j] = s
    cell_n[c] = last
    n_last = ip[I_N] - 1
    if i != n_last:  # relabel the last molecule as i
        c2 = pid_cell[n_last]
        s2 = pid_slot[n_last]
        cell_pid[c2, s2] = i
        pid_cell[i] = c2
        pid_slot[i] = s2
    ip[I_N] = n_last


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def displacement_tail(b0, b1, zbin_n, tail_table, nbins):
    """Change of the slab tail when one molecule moves from z bin b0 to b1 (b0 != b1): its
    sum over the other molecules' bins at the new place minus the old, less its own bin."""
    db = b1 - b0
    if db < 0:
        db = -db
    return (
        slab_tail_sum(b1, zbin_n, tail_table, nbins)
        - slab_tail_sum(b0, zbin_n, tail_table, nbins)
        - (tail_table[db] - tail_table[0])
    )


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def relocate_molecule(
    i, c, s, c1, x1, y1, z1, b0, b1, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n
):
    """Apply an accepted displacement of molecule i (cell c, slot s) to (x1, y1, z1) in cell c1,
    z bin b0 -> b1."""
    if c1 == c:
        cell_xyz[c, 0, s] = x1
        cell_xyz[c, 1, s] = y1
        cell_xyz[c, 2, s] = z1
        zbin_n[b0] -= 1
        zbin_n[b1] += 1
    else:
        remove_molecule(i, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n)
        add_molecule(x1, y1, z1, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n)


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def _wrap(v, length):
    if v >= length:
        v -= length
    elif v < 0.0:
        v += length
    return v


@njit(cache=True, fastmath=MOVE_FASTMATH, error_model="numpy", boundscheck=False, _nrt=False)
def run_moves(
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
    out_n,
    out_uff,
    out_usf,
    out_start,
    profile,
    scratch,
):
    """Run n_moves trial moves. Every sample_every moves, record N, U_ff, U_sf at
    out_*[out_start + k] and add the z-bin counts to ``profile``. Returns samples written.

    ``scratch`` (float64[6, >= k_trials], the caller's) holds the trial positions, weights
    and energies of biased insertion: the loop runs without the runtime that allocates.

    This is the only compiled entry point of the move loop, called from Python and from no
    other compiled function. A second compiled caller would link its own copy of the loop
    into its own module, where LLVM may reassociate the fastmath sums differently; the copy
    that ran would then depend on whether this process compiled the engine or loaded it from
    numba's cache, and a build would not be bit-for-bit reproducible across processes
    (tests/test_startup.py checks this).
    """
    lx = fp[F_LX]
    ly = fp[F_LY]
    lz = fp[F_LZ]
    beta = fp[F_BETA]
    zv = fp[F_ZV]
    dmax = fp[F_DMAX]
    p_disp = fp[F_P_DISPLACE]
    max_bu = fp[F_MAX_BETA_U]
    slit = ip[I_SLIT] == 1
    k_trials = ip[I_KTRIALS]
    nbins = ip[I_NBINS]
    tx = scratch[0]
    ty = scratch[1]
    tz = scratch[2]
    tw = scratch[3]
    tff = scratch[4]
    tsf = scratch[5]
    written = 0
    for move in range(n_moves):
        n = ip[I_N]
        r = uniform(rng)
        if r < p_disp:
            # ---- displacement
            if n > 0:
                counters[C_DISP_TRY] += 1
                i = below(rng, n)
                c = pid_cell[i]
                s = pid_slot[i]
                x0 = cell_xyz[c, 0, s]
                y0 = cell_xyz[c, 1, s]
                z0 = cell_xyz[c, 2, s]
                x1 = _wrap(x0 + dmax * (2.0 * uniform(rng) - 1.0), lx)
                y1 = _wrap(y0 + dmax * (2.0 * uniform(rng) - 1.0), ly)
                z1 = z0 + dmax * (2.0 * uniform(rng) - 1.0)
                ok = True
                if slit:
                    if z1 <= 0.0 or z1 >= lz:
                        ok = False
                else:
                    z1 = _wrap(z1, lz)
                if ok:
                    usf1 = wall_energy(z1, fp, ip)
                    if usf1 * beta > max_bu:
                        ok = False
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
                        energy[E_FF] += dff
                        energy[E_SF] += dsf
                        relocate_molecule(
                            i,
                            c,
                            s,
                            c1,
                            x1,
                            y1,
                            z1,
                            b0,
                            b1,
                            ip,
                            fp,
                            cell_xyz,
                            cell_n,
                            cell_pid,
                            pid_cell,
                            pid_slot,
                            zbin_n,
                        )
        elif uniform(rng) < 0.5:
            # ---- insertion with k trial positions
            counters[C_INS_TRY] += 1
            wsum = 0.0
            for t in range(k_trials):
                x = uniform(rng) * lx
                y = uniform(rng) * ly
                z = uniform(rng) * lz
                tx[t] = x
                ty[t] = y
                tz[t] = z
                dff, dsf, ov = trial_energy(
                    x, y, z, -1, -1, n, -1, fp, ip, cell_xyz, cell_n, nbr, nbr_n, zbin_n, tail_table
                )
                w = 0.0
                if not ov:
                    bu = beta * (dff + dsf)
                    if bu < max_bu:
                        w = math.exp(-bu)
                tw[t] = w
                tff[t] = dff
                tsf[t] = dsf
                wsum += w
            if wsum > 0.0:
                pick = 0
                if k_trials > 1:
                    target = uniform(rng) * wsum
                    cum = 0.0
                    pick = k_trials - 1
                    for t in range(k_trials):
                        cum += tw[t]
                        if cum > target and tw[t] > 0.0:
                            pick = t
                            break
                    while tw[pick] == 0.0:  # guard against rounding at the end
                        pick -= 1
                acc = zv * wsum / (k_trials * (n + 1.0))
                if acc >= 1.0 or uniform(rng) < acc:
                    counters[C_INS_ACC] += 1
                    energy[E_FF] += tff[pick]
                    energy[E_SF] += tsf[pick]
                    add_molecule(
                        tx[pick],
                        ty[pick],
                        tz[pick],
                        ip,
                        fp,
                        cell_xyz,
                        cell_n,
                        cell_pid,
                        pid_cell,
                        pid_slot,
                        zbin_n,
                    )
        else:
            # ---- deletion (with k - 1 trial positions when biased)
            counters[C_DEL_TRY] += 1
            if n > 0:
                i = below(rng, n)
                c = pid_cell[i]
                s = pid_slot[i]
                x0 = cell_xyz[c, 0, s]
                y0 = cell_xyz[c, 1, s]
                z0 = cell_xyz[c, 2, s]
                b0 = zbin_of(z0, fp, ip)
                dff0, dsf0, _ = trial_energy(
                    x0,
                    y0,
                    z0,
                    c,
                    s,
                    n - 1,
                    b0,
                    fp,
                    ip,
                    cell_xyz,
                    cell_n,
                    nbr,
                    nbr_n,
                    zbin_n,
                    tail_table,
                )
                wsum = math.exp(-beta * (dff0 + dsf0))
                for _t in range(k_trials - 1):
                    x = uniform(rng) * lx
                    y = uniform(rng) * ly
                    z = uniform(rng) * lz
                    dff, dsf, ov = trial_energy(
                        x,
                        y,
                        z,
                        c,
                        s,
                        n - 1,
                        b0,
                        fp,
                        ip,
                        cell_xyz,
                        cell_n,
                        nbr,
                        nbr_n,
                        zbin_n,
                        tail_table,
                    )
                    if not ov:
                        bu = beta * (dff + dsf)
                        if bu < max_bu:
                            wsum += math.exp(-bu)
                acc = k_trials * n / (zv * wsum)
                if acc >= 1.0 or uniform(rng) < acc:
                    counters[C_DEL_ACC] += 1
                    energy[E_FF] -= dff0
                    energy[E_SF] -= dsf0
                    remove_molecule(
                        i, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n
                    )
        if sample_every > 0 and (move + 1) % sample_every == 0:
            k = out_start + written
            out_n[k] = ip[I_N]
            out_uff[k] = energy[E_FF]
            out_usf[k] = energy[E_SF]
            for b in range(nbins):
                profile[b] += zbin_n[b]
            written += 1
    return written


@njit(cache=True, error_model="numpy", boundscheck=False)
def total_energy(
    fp, ip, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, nbr, nbr_n, zbin_n, tail_table
):
    """Full recomputation of (U_ff, U_sf) from the configuration (the bookkeeping check)."""
    n = ip[I_N]
    uff = 0.0
    usf = 0.0
    for i in range(n):
        c = pid_cell[i]
        s = pid_slot[i]
        x = cell_xyz[c, 0, s]
        y = cell_xyz[c, 1, s]
        z = cell_xyz[c, 2, s]
        e, _ = pair_energy(x, y, z, c, c, s, fp, ip, cell_xyz, cell_n, nbr, nbr_n)
        uff += 0.5 * e
        usf += wall_energy(z, fp, ip)
    if ip[I_SLIT] == 0:
        uff += n * n * fp[F_LRC_C] / fp[F_VOLUME]
    elif ip[I_SLAB] == 1:
        nb = ip[I_NBINS]
        t = 0.0
        for a in range(nb):
            if zbin_n[a] > 0:
                t += zbin_n[a] * slab_tail_sum(a, zbin_n, tail_table, nb)
        uff += 0.5 * (t - n * tail_table[0]) + fp[F_SLAB_C] * n * (n - 1) * 0.5
    return uff, usf
