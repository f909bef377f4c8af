"""Continuous fractional component Monte Carlo (CFCMC; Shi & Maginn, J. Chem. Theory Comput. 3
(2007) 1451): grand canonical exchange through one fractional molecule, and its fixed-N form
for the excess chemical potential.

Ensemble. Besides the N whole molecules of a :class:`gcmc.sampling.box.Box`, one fractional
molecule at r_f with a coupling lambda in [0, 1] interacts with them through a soft-core pair
potential (Beutler, Mark, van Schaik, Gerber & van Gunsteren, Chem. Phys. Lett. 222 (1994) 529)

    u(r, lambda) = 4 eps lambda [1/(a + (r/sigma)^6)^2 - 1/(a + (r/sigma)^6)],
    a = alpha (1 - lambda)^2, alpha = 0.5 by default,

truncated at r_c like the whole pairs: zero at lambda = 0, the plain LJ at lambda = 1, finite
at r = 0 for lambda < 1 (scaling epsilon alone would keep the r^-12 overlap at every lambda > 0).
Its wall energy is lambda V_wall(z_f) and its tail correction lambda times a whole molecule's
(bulk: lambda (2N + 1) c / V with U_tail = N^2 c / V; slit with the slab tail: lambda times the
slab term of a molecule at z_f with the N whole molecules' profile). At lambda = 1 the
fractional molecule therefore has exactly a whole molecule's energy, and at lambda = 0 none,
which is all that the measurements below use; between the ends lambda is a sampling path.

The weight of a state (N whole molecules at r^N, the fractional one at r_f, lambda) is

    pi ~ z^N / N! exp(-beta U(r^N, r_f, lambda) + W(lambda)),

W the bias on lambda (piecewise constant on ``n_lambda_bins`` bins of [0, 1], flattened by
Wang-Landau and then fixed). Moves (all symmetric proposals, Metropolis acceptance derived from
detailed balance in this expanded ensemble):

- displacement of a whole molecule, or of the fractional one: min(1, exp(-beta dU));
- lambda change lambda' = lambda + d, d uniform in (-dlambda, dlambda), dlambda <= 1:
  - 0 <= lambda' <= 1: min(1, exp(-beta dU + W(lambda') - W(lambda)));
  - lambda' > 1 (grand canonical only; insertion): the fractional molecule becomes whole where
    it is, and a new fractional molecule is placed uniformly in V with lambda' - 1:
    min(1, z V / (N + 1) exp(-beta dU + W(lambda' - 1) - W(lambda)));
  - lambda' < 0 (grand canonical only; deletion): the fractional molecule is removed and a
    whole molecule chosen uniformly becomes fractional where it is, with lambda' + 1:
    min(1, N / (z V) exp(-beta dU + W(lambda' + 1) - W(lambda)));
  the two are each other's reverse (the same |d|). Without the grand canonical flag a lambda'
  outside [0, 1] is rejected (fixed N).

Optionally (``FractionalOptions.n_window`` > 0) the bias depends on (N, lambda) for N in a
window [n_min, n_min + n_window) (moves that would leave it are rejected once inside), so that
Wang-Landau flattens N within the window as well; ``window_log_distribution`` then gives the
grand canonical ln p(N) in the window from the uncoupled states.

Measurements. With the bias removed, p(lambda) at the ends gives the excess chemical potential
(Shi & Maginn 2007): at fixed N, p(1)/p(0) = Q_{N+1}/(V Q_N) = exp(-beta mu_ex) (the ratio of
the configurational integrals, Widom's relation), so beta mu_ex = -ln[p(1)/p(0)] with
p = histogram x exp(-W). The states with lambda = 0 are grand canonical states of the N whole
molecules (their weight is z^N/N! Q_N V), so the density is read from the samples with lambda
in the first bin.

Layout: the compiled loop ``run_fractional_moves`` works on the Box's arrays (the whole
molecules, their cells and their energy ``box.energy`` as the engine keeps it) plus
``fstate`` (the fractional molecule: position, lambda, and its energy with the whole ones,
fluid and wall parts), ``fpar``/``ipar`` (the move parameters) and its own counters. The
fractional molecule is in no cell and no z bin. ``run_moves`` of the engine is not touched:
this module only inlines the engine's helpers.

Status: validated in tests/test_fractional.py; not used by builds. Measured against
whole-molecule insertion in benchmarks/README.md ("Fractional-molecule exchange (CFCMC)"):
with a bias in lambda only it completes 0.3-1.2x as many exchanges per CPU second as plain
insertion in the dense bulk liquid (more only where insertion is accepted below ~4e-4), and
none in the filled 3 sigma argon slit; with the (N, lambda) window, one exploratory run there
made 39 in 10^7 moves (4.7x the rate of k = 64 insertion).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from gcmc.errors import InputError
from gcmc.physics.model import SLIT, PoreModel
from gcmc.sampling import engine as E
from gcmc.sampling.box import Box, EngineOptions
from gcmc.sampling.engine import (
    F_BETA,
    F_DMAX,
    F_EPS4,
    F_LX,
    F_LY,
    F_LZ,
    F_MAX_BETA_U,
    F_RC2,
    F_SIG2,
    F_ZV,
    I_N,
    I_NBINS,
    I_SLAB,
    I_SLIT,
    MOVE_FASTMATH,
    add_molecule,
    cell_of,
    insertion_tail,
    pair_energy,
    remove_molecule,
    trial_energy,
    wall_energy,
    zbin_of,
)
from gcmc.sampling.rng import below, uniform

# fpar indices
P_ALPHA, P_DLAM, P_WHOLE, P_FRAC, P_DMAX_F, P_WL_LNF = 0, 1, 2, 3, 4, 5
N_PPARAMS = 6
# ipar indices
Q_GRAND, Q_NLBINS, Q_NMIN, Q_NWIN = 0, 1, 2, 3
N_QPARAMS = 4
# fstate indices
S_X, S_Y, S_Z, S_LAM, S_UFF, S_USF = 0, 1, 2, 3, 4, 5
N_STATE = 6
# counters
K_WD_TRY, K_WD_ACC, K_FD_TRY, K_FD_ACC, K_LAM_TRY, K_LAM_ACC = 0, 1, 2, 3, 4, 5
K_UP_TRY, K_UP_ACC, K_DN_TRY, K_DN_ACC = 6, 7, 8, 9
N_FCOUNTERS = 10


@njit(cache=True, fastmath=MOVE_FASTMATH, error_model="numpy", boundscheck=False, inline="always")
def _sc_pair(r2, lam, a, fp):
    """Soft-core pair energy (K) at squared distance r2 (nm^2), 0 beyond r_c."""
    if r2 >= fp[F_RC2]:
        return 0.0
    s2 = r2 / fp[F_SIG2]
    inv = 1.0 / (a + s2 * s2 * s2)
    return fp[F_EPS4] * lam * (inv * inv - inv)


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def _min_image_r2(x0, y0, z0, x1, y1, z1, fp, ip):
    lx = fp[F_LX]
    ly = fp[F_LY]
    lz = fp[F_LZ]
    dx = x1 - x0
    dy = y1 - y0
    dz = z1 - z0
    dx -= lx * np.floor(dx / lx + 0.5)
    dy -= ly * np.floor(dy / ly + 0.5)
    if ip[I_SLIT] == 0:
        dz -= lz * np.floor(dz / lz + 0.5)
    return dx * dx + dy * dy + dz * dz


@njit(cache=True, fastmath=MOVE_FASTMATH, error_model="numpy", boundscheck=False, inline="always")
def _frac_pairs(x, y, z, lam, skip_cell, skip_slot, fp, ip, alpha, cell_xyz, cell_n, nbr, nbr_n):
    """Soft-core energy (K) of a fractional molecule at (x, y, z) with coupling lam and all
    whole molecules within r_c except the one at (skip_cell, skip_slot). Returns (u, overlap):
    overlap when one pair's beta u exceeds the engine's hard-overlap limit."""
    if lam <= 0.0:
        return 0.0, False
    lx = fp[F_LX]
    ly = fp[F_LY]
    lz = fp[F_LZ]
    ilx = 1.0 / lx
    ily = 1.0 / ly
    ilz = 1.0 / lz
    rc2 = fp[F_RC2]
    inv_sig2 = 1.0 / fp[F_SIG2]
    a = alpha * (1.0 - lam) * (1.0 - lam)
    pre = fp[F_EPS4] * lam
    thr = fp[F_MAX_BETA_U] / (fp[F_BETA] * pre)  # a pair's (inv^2 - inv) above this: overlap
    periodic_z = 1.0 - float(ip[I_SLIT])
    c_home = cell_of(x, y, z, fp, ip)
    acc = 0.0
    for k in range(nbr_n[c_home]):
        c = nbr[c_home, k]
        n = cell_n[c]
        if n == 0:
            continue
        skip = (skip_slot + 1) * np.int64(c == skip_cell) - 1
        e = 0.0
        # as the engine's pair_energy: whole SIMD vectors over the slots rounded up to a
        # multiple of 8 (the capacity leaves room), padding, the skipped slot and pairs
        # beyond r_c masked by a select, an overlapping pair adding E.OVERLAP_FLAG
        for j in range((n + 7) & -8):
            dx = x - cell_xyz[c, 0, j]
            dy = y - cell_xyz[c, 1, j]
            dz = z - cell_xyz[c, 2, j]
            dx -= lx * np.floor(dx * ilx + 0.5)
            dy -= ly * np.floor(dy * ily + 0.5)
            dz -= periodic_z * lz * np.floor(dz * ilz + 0.5)
            r2 = dx * dx + dy * dy + dz * dz
            s2 = r2 * inv_sig2
            inv = 1.0 / (a + s2 * s2 * s2)
            t = inv * inv - inv
            masked = (j == skip) | (j >= n) | (r2 >= rc2)
            e += 0.0 if masked else (E.OVERLAP_FLAG if t > thr else t)
        if e >= 0.5 * E.OVERLAP_FLAG:
            return 0.0, True
        acc += e
    return pre * acc, False


@njit(cache=True, fastmath=MOVE_FASTMATH, error_model="numpy", boundscheck=False, inline="always")
def _frac_energy(
    x,
    y,
    z,
    lam,
    skip_cell,
    skip_slot,
    n_others,
    skip_bin,
    fp,
    ip,
    alpha,
    cell_xyz,
    cell_n,
    nbr,
    nbr_n,
    zbin_n,
    tail_table,
):
    """(u_ff, u_sf, overlap) of a fractional molecule at (x, y, z) with coupling lam, with the
    whole molecules except the one at (skip_cell, skip_slot, skip_bin); n_others = the number
    of whole molecules it interacts with. u_ff includes lam x the tail correction."""
    if lam <= 0.0:
        return 0.0, 0.0, False
    usf = lam * wall_energy(z, fp, ip)
    if usf * fp[F_BETA] > fp[F_MAX_BETA_U]:
        return 0.0, 0.0, True
    u, ov = _frac_pairs(
        x, y, z, lam, skip_cell, skip_slot, fp, ip, alpha, cell_xyz, cell_n, nbr, nbr_n
    )
    if ov:
        return 0.0, 0.0, True
    b = zbin_of(z, fp, ip)
    tail = insertion_tail(b, n_others, fp, ip, zbin_n, tail_table)
    if skip_cell >= 0 and ip[I_SLIT] == 1 and ip[I_SLAB] == 1:
        d = b - skip_bin
        if d < 0:
            d = -d
        tail -= tail_table[d]
    return u + lam * tail, usf, False


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def _lam_bin(lam, nb):
    b = int(lam * nb)
    if b < 0:
        return 0
    return b if b < nb else nb - 1


@njit(cache=True, error_model="numpy", boundscheck=False, inline="always")
def _widx(n, lam, nlb, nmin, nwin):
    """Index of the bias of (N = n, lambda): the lambda bin (nwin = 0), or the bin of N in
    the window [nmin, nmin + nwin) times nlb plus the lambda bin; -1 outside the window."""
    b = _lam_bin(lam, nlb)
    if nwin == 0:
        return b
    k = n - nmin
    if k < 0 or k >= nwin:
        return -1
    return k * nlb + b


@njit(cache=True, fastmath=MOVE_FASTMATH, error_model="numpy", boundscheck=False, _nrt=False)
def run_fractional_moves(
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
    fpar,
    ipar,
    fstate,
    weights,
    wl_hist,
    counters,
    out_n,
    out_lam,
    out_u,
    out_start,
):
    """Run n_moves CFCMC trial moves (see the module docstring). Every sample_every moves,
    record N (whole molecules), lambda and the total energy (K) at out_*[out_start + k].
    With fpar[P_WL_LNF] > 0 (Wang-Landau), after every move the bias of the current lambda
    bin is lowered by that amount and wl_hist of the bin incremented. Returns samples
    written. Called from Python only, never from another compiled function (the engine's
    rule for bit-reproducible builds, DEVELOPERS.md); the engine's helpers are inlined."""
    lx = fp[F_LX]
    ly = fp[F_LY]
    lz = fp[F_LZ]
    beta = fp[F_BETA]
    zv = fp[F_ZV]
    dmax = fp[F_DMAX]
    max_bu = fp[F_MAX_BETA_U]
    slit = ip[I_SLIT] == 1
    slab = slit and ip[I_SLAB] == 1
    nbins = ip[I_NBINS]
    alpha = fpar[P_ALPHA]
    dlam = fpar[P_DLAM]
    p_whole = fpar[P_WHOLE]
    p_frac = fpar[P_FRAC]
    dmax_f = fpar[P_DMAX_F]
    wl_lnf = fpar[P_WL_LNF]
    grand = ipar[Q_GRAND] == 1
    nlb = ipar[Q_NLBINS]
    nmin = ipar[Q_NMIN]
    nwin = ipar[Q_NWIN]
    written = 0
    for move in range(n_moves):
        n = ip[I_N]
        xf = fstate[S_X]
        yf = fstate[S_Y]
        zf = fstate[S_Z]
        lam = fstate[S_LAM]
        r = uniform(rng)
        if r < p_whole:
            # ---- displacement of a whole molecule (pairs with the whole ones and the
            # fractional one, wall, slab tail including the fractional molecule's term)
            if n > 0:
                counters[K_WD_TRY] += 1
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
                uf1 = 0.0
                uf0 = 0.0
                if ok and lam > 0.0:
                    a = alpha * (1.0 - lam) * (1.0 - lam)
                    uf1 = _sc_pair(_min_image_r2(x1, y1, z1, xf, yf, zf, fp, ip), lam, a, fp)
                    if uf1 * beta > max_bu:
                        ok = False
                    uf0 = _sc_pair(_min_image_r2(x0, y0, z0, xf, yf, zf, fp, ip), lam, a, fp)
                if ok:
                    uff0, _ = pair_energy(x0, y0, z0, c, c, s, fp, ip, cell_xyz, cell_n, nbr, nbr_n)
                    usf0 = wall_energy(z0, fp, ip)
                    dtail = 0.0
                    dftail = 0.0
                    b0 = zbin_of(z0, fp, ip)
                    b1 = zbin_of(z1, fp, ip)
                    if slab and b0 != b1:
                        dtail = E.displacement_tail(b0, b1, zbin_n, tail_table, nbins)
                        bf = zbin_of(zf, fp, ip)
                        d1 = b1 - bf
                        d0 = b0 - bf
                        if d1 < 0:
                            d1 = -d1
                        if d0 < 0:
                            d0 = -d0
                        dftail = lam * (tail_table[d1] - tail_table[d0])
                    dff = uff1 - uff0 + dtail
                    dsf = usf1 - usf0
                    dfr = uf1 - uf0 + dftail
                    du = dff + dsf + dfr
                    if du <= 0.0 or uniform(rng) < math.exp(-beta * du):
                        counters[K_WD_ACC] += 1
                        energy[E.E_FF] += dff
                        energy[E.E_SF] += dsf
                        fstate[S_UFF] += dfr
                        E.relocate_molecule(
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
        elif r < p_frac:
            # ---- displacement of the fractional molecule
            counters[K_FD_TRY] += 1
            x1 = E._wrap(xf + dmax_f * (2.0 * uniform(rng) - 1.0), lx)
            y1 = E._wrap(yf + dmax_f * (2.0 * uniform(rng) - 1.0), ly)
            z1 = zf + dmax_f * (2.0 * uniform(rng) - 1.0)
            ok = True
            if slit:
                if z1 <= 0.0 or z1 >= lz:
                    ok = False
            else:
                z1 = E._wrap(z1, lz)
            if ok:
                uff1, usf1, ov = _frac_energy(
                    x1,
                    y1,
                    z1,
                    lam,
                    -1,
                    -1,
                    n,
                    -1,
                    fp,
                    ip,
                    alpha,
                    cell_xyz,
                    cell_n,
                    nbr,
                    nbr_n,
                    zbin_n,
                    tail_table,
                )
                if not ov:
                    du = uff1 + usf1 - fstate[S_UFF] - fstate[S_USF]
                    if du <= 0.0 or uniform(rng) < math.exp(-beta * du):
                        counters[K_FD_ACC] += 1
                        fstate[S_X] = x1
                        fstate[S_Y] = y1
                        fstate[S_Z] = z1
                        fstate[S_UFF] = uff1
                        fstate[S_USF] = usf1
        else:
            # ---- change of lambda, with the exchange transitions beyond the ends
            lam1 = lam + dlam * (2.0 * uniform(rng) - 1.0)
            i0 = _widx(n, lam, nlb, nmin, nwin)
            w0 = weights[i0] if i0 >= 0 else 0.0
            if 0.0 <= lam1 <= 1.0:
                counters[K_LAM_TRY] += 1
                uff1, usf1, ov = _frac_energy(
                    xf,
                    yf,
                    zf,
                    lam1,
                    -1,
                    -1,
                    n,
                    -1,
                    fp,
                    ip,
                    alpha,
                    cell_xyz,
                    cell_n,
                    nbr,
                    nbr_n,
                    zbin_n,
                    tail_table,
                )
                if not ov:
                    du = uff1 + usf1 - fstate[S_UFF] - fstate[S_USF]
                    i1 = _widx(n, lam1, nlb, nmin, nwin)
                    w1 = weights[i1] if i1 >= 0 else 0.0
                    ln_acc = -beta * du + w1 - w0
                    if ln_acc >= 0.0 or uniform(rng) < math.exp(ln_acc):
                        counters[K_LAM_ACC] += 1
                        fstate[S_LAM] = lam1
                        fstate[S_UFF] = uff1
                        fstate[S_USF] = usf1
            elif grand and lam1 > 1.0:
                # insertion: the fractional molecule becomes whole; a new one at lam1 - 1
                counters[K_UP_TRY] += 1
                lam2 = lam1 - 1.0
                i1 = _widx(n + 1, lam2, nlb, nmin, nwin)
                w1 = weights[i1] if i1 >= 0 else 0.0
                dff, dsf, ov = trial_energy(
                    xf,
                    yf,
                    zf,
                    -1,
                    -1,
                    n,
                    -1,
                    fp,
                    ip,
                    cell_xyz,
                    cell_n,
                    nbr,
                    nbr_n,
                    zbin_n,
                    tail_table,
                )
                if i0 >= 0 and i1 < 0:
                    ov = True  # the N window is not left
                if not ov:
                    x2 = uniform(rng) * lx
                    y2 = uniform(rng) * ly
                    z2 = uniform(rng) * lz
                    add_molecule(
                        xf, yf, zf, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n
                    )
                    uff2, usf2, ov2 = _frac_energy(
                        x2,
                        y2,
                        z2,
                        lam2,
                        -1,
                        -1,
                        n + 1,
                        -1,
                        fp,
                        ip,
                        alpha,
                        cell_xyz,
                        cell_n,
                        nbr,
                        nbr_n,
                        zbin_n,
                        tail_table,
                    )
                    accepted = False
                    if not ov2:
                        du = dff + dsf + uff2 + usf2 - fstate[S_UFF] - fstate[S_USF]
                        ln_acc = -beta * du + w1 - w0
                        ln_acc += math.log(zv / (n + 1.0))
                        if ln_acc >= 0.0 or uniform(rng) < math.exp(ln_acc):
                            accepted = True
                    if accepted:
                        counters[K_UP_ACC] += 1
                        energy[E.E_FF] += dff
                        energy[E.E_SF] += dsf
                        fstate[S_X] = x2
                        fstate[S_Y] = y2
                        fstate[S_Z] = z2
                        fstate[S_LAM] = lam2
                        fstate[S_UFF] = uff2
                        fstate[S_USF] = usf2
                    else:  # undo: the molecule just appended is the last of its cell and of N
                        remove_molecule(
                            n, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n
                        )
            elif grand and lam1 < 0.0:
                # deletion: the fractional molecule vanishes; a whole one becomes fractional
                counters[K_DN_TRY] += 1
                i1 = _widx(n - 1, lam1 + 1.0, nlb, nmin, nwin)
                if n > 0 and not (i0 >= 0 and i1 < 0):  # the N window is not left
                    lam2 = lam1 + 1.0
                    w1 = weights[i1] if i1 >= 0 else 0.0
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
                    uff2, usf2, ov2 = _frac_energy(
                        x0,
                        y0,
                        z0,
                        lam2,
                        c,
                        s,
                        n - 1,
                        b0,
                        fp,
                        ip,
                        alpha,
                        cell_xyz,
                        cell_n,
                        nbr,
                        nbr_n,
                        zbin_n,
                        tail_table,
                    )
                    if not ov2:
                        du = uff2 + usf2 - dff0 - dsf0 - fstate[S_UFF] - fstate[S_USF]
                        ln_acc = -beta * du + w1 - w0
                        ln_acc += math.log(n / zv)
                        if ln_acc >= 0.0 or uniform(rng) < math.exp(ln_acc):
                            counters[K_DN_ACC] += 1
                            energy[E.E_FF] -= dff0
                            energy[E.E_SF] -= dsf0
                            remove_molecule(
                                i, ip, fp, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, zbin_n
                            )
                            fstate[S_X] = x0
                            fstate[S_Y] = y0
                            fstate[S_Z] = z0
                            fstate[S_LAM] = lam2
                            fstate[S_UFF] = uff2
                            fstate[S_USF] = usf2
            else:
                counters[K_LAM_TRY] += 1  # fixed N: a lambda beyond the ends is rejected
        if wl_lnf > 0.0:
            b = _widx(ip[I_N], fstate[S_LAM], nlb, nmin, nwin)
            if b >= 0:
                weights[b] -= wl_lnf
                wl_hist[b] += 1
        if sample_every > 0 and (move + 1) % sample_every == 0:
            k = out_start + written
            out_n[k] = ip[I_N]
            out_lam[k] = fstate[S_LAM]
            out_u[k] = energy[E.E_FF] + energy[E.E_SF] + fstate[S_UFF] + fstate[S_USF]
            written += 1
    return written


@njit(cache=True, error_model="numpy", boundscheck=False)
def fractional_energy(fp, ip, cell_xyz, cell_n, nbr, nbr_n, zbin_n, tail_table, fpar, fstate):
    """(u_ff, u_sf) of the fractional molecule recomputed from the configuration (the
    bookkeeping check); called from Python only."""
    u, w, ov = _frac_energy(
        fstate[S_X],
        fstate[S_Y],
        fstate[S_Z],
        fstate[S_LAM],
        -1,
        -1,
        ip[I_N],
        -1,
        fp,
        ip,
        fpar[P_ALPHA],
        cell_xyz,
        cell_n,
        nbr,
        nbr_n,
        zbin_n,
        tail_table,
    )
    if ov:
        return np.inf, np.inf
    return u, w


# ---------------------------------------------------------------------------------------
# Python side


@dataclass(frozen=True)
class FractionalOptions:
    """Move mix and coupling of the fractional-molecule sampler.

    ``whole_displacement`` and ``fractional_displacement`` are the probabilities of the two
    displacement moves; the rest are lambda changes. ``max_dlambda`` <= 1.
    ``soft_core_alpha``: alpha of the Beutler et al. (1994) soft core.
    """

    whole_displacement: float = 0.5
    fractional_displacement: float = 0.1
    max_dlambda: float = 0.2
    soft_core_alpha: float = 0.5
    n_lambda_bins: int = 50
    #: 0: the bias depends on lambda only; > 0: on (N, lambda) for N in a window of this many
    #: values starting at ``FractionalSampler.set_window``'s n_min (moves leaving it rejected)
    n_window: int = 0
    max_fractional_displacement_nm: float | None = None

    def validate(self) -> None:
        """One-line InputError naming the field and the problem."""
        if not 0.0 <= self.whole_displacement < 1.0:
            raise InputError(f"whole_displacement: {self.whole_displacement} not in [0, 1)")
        if not 0.0 <= self.fractional_displacement < 1.0 - self.whole_displacement:
            raise InputError(
                f"fractional_displacement: {self.fractional_displacement} leaves no lambda moves"
            )
        if not 0.0 < self.max_dlambda <= 1.0:
            raise InputError(f"max_dlambda: {self.max_dlambda} not in (0, 1]")
        if not self.soft_core_alpha > 0.0:
            raise InputError(f"soft_core_alpha: {self.soft_core_alpha} must be > 0")
        if int(self.n_lambda_bins) < 2:
            raise InputError(f"n_lambda_bins: {self.n_lambda_bins} must be >= 2")


class FractionalSampler:
    """A Box with one fractional molecule: grand canonical (``grand=True``) or at fixed N."""

    def __init__(
        self,
        model: PoreModel,
        temperature_k: float,
        activity_nm3: float,
        grand: bool = True,
        options: FractionalOptions | None = None,
        engine_options: EngineOptions | None = None,
        rng_state: np.ndarray | None = None,
    ):
        self.options = options or FractionalOptions()
        self.options.validate()
        self.box = Box(model, temperature_k, activity_nm3, engine_options, rng_state)
        o = self.options
        self.fpar = np.zeros(N_PPARAMS)
        self.fpar[P_ALPHA] = o.soft_core_alpha
        self.fpar[P_DLAM] = o.max_dlambda
        self.fpar[P_WHOLE] = o.whole_displacement
        self.fpar[P_FRAC] = o.whole_displacement + o.fractional_displacement
        d = o.max_fractional_displacement_nm
        self.fpar[P_DMAX_F] = d if d else self.box.fp[F_DMAX]
        self.ipar = np.zeros(N_QPARAMS, dtype=np.int64)
        self.ipar[Q_GRAND] = 1 if grand else 0
        self.ipar[Q_NLBINS] = int(o.n_lambda_bins)
        nw = max(1, int(o.n_window))
        self.ipar[Q_NWIN] = int(o.n_window)
        self.weights = np.zeros(nw * int(o.n_lambda_bins))
        self.wl_hist = np.zeros(nw * int(o.n_lambda_bins), dtype=np.int64)
        self.counters = np.zeros(N_FCOUNTERS, dtype=np.int64)
        self.fstate = np.zeros(N_STATE)
        lx, ly, lz = model.box_lengths_nm
        self.fstate[S_X], self.fstate[S_Y], self.fstate[S_Z] = 0.5 * lx, 0.5 * ly, 0.5 * lz
        self._slit = model.geometry == SLIT

    def set_window(self, n_min: int) -> None:
        """First N of the (N, lambda) bias window (with ``n_window`` > 0)."""
        if int(n_min) < 0:
            raise InputError(f"n_min: {n_min} must be >= 0")
        self.ipar[Q_NMIN] = int(n_min)

    @property
    def n_whole(self) -> int:
        """Whole molecules in the box now."""
        return self.box.n_molecules

    @property
    def coupling(self) -> float:
        """The fractional molecule's lambda now."""
        return float(self.fstate[S_LAM])

    def load_positions(self, positions: np.ndarray, coupling: float = 0.0) -> int:
        """Whole molecules from positions (overlaps dropped, energy recomputed); the fractional
        molecule keeps its position (initially the box centre) and gets lambda = ``coupling``
        (:meth:`place_fractional`). Returns the number of whole molecules loaded."""
        n = self.box.load_positions(positions)
        self.place_fractional(coupling)
        return n

    def place_fractional(self, coupling: float = 0.0, position: np.ndarray | None = None) -> None:
        """Put the fractional molecule at ``position`` (default: the box centre) with lambda =
        ``coupling`` and compute its energy; an overlapping place raises InputError."""
        if not 0.0 <= coupling <= 1.0:
            raise InputError(f"coupling: {coupling} not in [0, 1]")
        if position is not None:
            self.fstate[S_X : S_Z + 1] = np.asarray(position, dtype=float)
        self.fstate[S_LAM] = coupling
        self.fstate[S_UFF] = 0.0
        self.fstate[S_USF] = 0.0
        u, w = self.recomputed_fractional_energy()
        if not (math.isfinite(u) and math.isfinite(w)):
            raise InputError("position: the fractional molecule overlaps a whole one")
        self.fstate[S_UFF], self.fstate[S_USF] = u, w

    def recomputed_fractional_energy(self) -> tuple[float, float]:
        """(u_ff, u_sf) of the fractional molecule from scratch (K)."""
        b = self.box
        return fractional_energy(
            b.fp, b.ip, b.cell_xyz, b.cell_n, b.nbr, b.nbr_n, b.zbin_n, b.tail_table,
            self.fpar, self.fstate,
        )  # fmt: skip

    def run(
        self,
        n_moves: int,
        sample_every: int = 0,
        out_n: np.ndarray | None = None,
        out_lam: np.ndarray | None = None,
        out_u: np.ndarray | None = None,
        out_start: int = 0,
        wang_landau_lnf: float = 0.0,
    ) -> int:
        """Run n_moves moves, sampling every sample_every (0: none); returns samples written."""
        if out_n is None or out_lam is None or out_u is None:
            out_n = np.zeros(1, dtype=np.int64)
            out_lam = np.zeros(1)
            out_u = np.zeros(1)
            sample_every = 0
        self.fpar[P_WL_LNF] = wang_landau_lnf
        b = self.box
        try:
            return run_fractional_moves(
                int(n_moves), int(sample_every), b.fp, b.ip, b.cell_xyz, b.cell_n, b.cell_pid,
                b.pid_cell, b.pid_slot, b.nbr, b.nbr_n, b.zbin_n, b.tail_table, b.rng, b.energy,
                self.fpar, self.ipar, self.fstate, self.weights, self.wl_hist, self.counters,
                out_n, out_lam, out_u, int(out_start),
            )  # fmt: skip
        finally:
            self.fpar[P_WL_LNF] = 0.0

    def flatten_weights(
        self,
        moves_per_check: int,
        ln_f_start: float = 1.0,
        ln_f_end: float = 1.0e-3,
        flatness: float = 0.8,
        max_checks: int = 1000,
    ) -> float:
        """Wang-Landau flattening of the lambda bias (Wang & Landau, Phys. Rev. Lett. 86 (2001)
        2050): lower W of the visited bin by ln f after every move; when every bin's count
        is at least ``flatness`` x the mean, halve ln f and restart the histogram; stop at
        ``ln_f_end`` or after ``max_checks`` checks. Returns the final ln f. W is then to
        be kept fixed (production runs are unbiased by construction once W is fixed)."""
        lnf = float(ln_f_start)
        self.wl_hist[:] = 0
        for _ in range(int(max_checks)):
            self.run(moves_per_check, wang_landau_lnf=lnf)
            h = self.wl_hist
            if h.min() >= flatness * h.mean():
                lnf *= 0.5
                self.wl_hist[:] = 0
                if lnf < ln_f_end:
                    break
        self.weights -= self.weights.max()
        return lnf

    def acceptance(self) -> dict[str, float]:
        """Accepted fraction per move kind (NaN if never tried)."""
        c = self.counters

        def ratio(a: int, t: int) -> float:
            return float(c[a] / c[t]) if c[t] else float("nan")

        return {
            "whole_displacement": ratio(K_WD_ACC, K_WD_TRY),
            "fractional_displacement": ratio(K_FD_ACC, K_FD_TRY),
            "lambda": ratio(K_LAM_ACC, K_LAM_TRY),
            "insertion": ratio(K_UP_ACC, K_UP_TRY),
            "deletion": ratio(K_DN_ACC, K_DN_TRY),
        }

    @property
    def exchanges(self) -> int:
        """Accepted insertions + deletions (lambda crossings) since the counters were reset."""
        return int(self.counters[K_UP_ACC] + self.counters[K_DN_ACC])


def unbiased_lambda_density(lam: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(bin centres, ln p(lambda) with the bias removed, up to a constant) from lambda samples
    taken with the fixed bias ``weights``; -inf where a bin was never visited."""
    nb = len(weights)
    h = np.bincount(np.minimum((np.asarray(lam) * nb).astype(np.int64), nb - 1), minlength=nb)
    centres = (np.arange(nb) + 0.5) / nb
    with np.errstate(divide="ignore"):
        return centres, np.log(h.astype(float)) - np.asarray(weights)


def end_log_ratio(lam: np.ndarray, weights: np.ndarray, fit_bins: int = 5) -> float:
    """ln[p(1)/p(0)] with the bias removed: ln p of the end bins extrapolated to lambda = 0
    and 1 by a least-squares quadratic over ``fit_bins`` bins at each end (a bin holds the
    mean density over its width; the fit removes the O(h) offset of its centre)."""
    x, lp = unbiased_lambda_density(lam, weights)
    k = int(fit_bins)
    if len(x) < 2 * k or not np.all(np.isfinite(lp[:k])) or not np.all(np.isfinite(lp[-k:])):
        return float("nan")
    deg = 2 if k >= 4 else 1
    c0 = np.polyfit(x[:k], lp[:k], deg)
    c1 = np.polyfit(x[-k:], lp[-k:], deg)
    return float(np.polyval(c1, 1.0) - np.polyval(c0, 0.0))


def excess_chemical_potential(
    lam: np.ndarray, weights: np.ndarray, n_blocks: int = 16, fit_bins: int = 5
) -> tuple[float, float]:
    """beta mu_ex = -ln[p(1)/p(0)] (Shi & Maginn 2007) from lambda samples at fixed N, and its
    standard error from ``n_blocks`` contiguous blocks (batch means: each block's estimate,
    their standard deviation / sqrt(n_blocks))."""
    lam = np.asarray(lam)
    est = -end_log_ratio(lam, weights, fit_bins)
    parts = np.array_split(lam, int(n_blocks))
    blocks = np.array([-end_log_ratio(p, weights, fit_bins) for p in parts])
    if not np.all(np.isfinite(blocks)):
        return est, float("nan")
    return est, float(blocks.std(ddof=1) / math.sqrt(len(blocks)))


def uncoupled_mean(
    values: np.ndarray, lam: np.ndarray, n_lambda_bins: int, n_blocks: int = 16
) -> tuple[float, float]:
    """Mean of ``values`` over the samples with lambda in the first bin (the states with the
    fractional molecule uncoupled: grand canonical states of the whole molecules), and its
    standard error from ``n_blocks`` contiguous time blocks (batch means). The offset of the
    bin's states from lambda = 0 is O(1 / n_lambda_bins) of the change of the quantity
    across lambda (for N: below one molecule / n_lambda_bins)."""
    values = np.asarray(values, dtype=float)
    first = np.asarray(lam) < 1.0 / int(n_lambda_bins)
    if not first.any():
        return float("nan"), float("nan")
    est = float(values[first].mean())
    means = []
    for v, f in zip(
        np.array_split(values, int(n_blocks)), np.array_split(first, int(n_blocks)), strict=True
    ):
        if not f.any():
            return est, float("nan")
        means.append(v[f].mean())
    return est, float(np.std(means, ddof=1) / math.sqrt(len(means)))


def growth_transits(n: np.ndarray, lam: np.ndarray, margin: float = 0.1) -> int:
    """Completed gradual exchanges in a sampled series: the number of times the extended
    coordinate N + lambda (continuous through the exchange transitions) moved from within
    ``margin`` of one integer to within ``margin`` of the next one (a molecule grown from
    nothing to whole, or shrunk away), a hysteresis count. Unlike the accepted lambda
    crossings it does not count a fractional molecule that flickers across an end."""
    x = np.asarray(n, dtype=float) + np.asarray(lam, dtype=float)
    if len(x) == 0:
        return 0
    count = 0
    m = round(float(x[0]))
    for v in x:
        if abs(v - m) > 1.0 - margin:
            k = round(float(v))
            count += abs(k - m)
            m = k
    return count


def window_log_distribution(
    n: np.ndarray, lam: np.ndarray, weights: np.ndarray, n_min: int, n_window: int
) -> np.ndarray:
    """ln p(N) of the grand canonical ensemble (up to a constant) for N in the bias window
    [n_min, n_min + n_window), from samples taken with a fixed (N, lambda) bias: the
    uncoupled states (lambda in the first bin) are grand canonical states of the N whole
    molecules, so p(N) ~ h(N, first bin) exp(-W(N, first bin)); -inf where never visited."""
    w = np.asarray(weights).reshape(int(n_window), -1)
    nlb = w.shape[1]
    sel = np.asarray(lam) < 1.0 / nlb
    k = np.asarray(n)[sel] - int(n_min)
    k = k[(k >= 0) & (k < n_window)]
    h = np.bincount(k, minlength=int(n_window)).astype(float)
    with np.errstate(divide="ignore"):
        return np.log(h) - w[:, 0]
