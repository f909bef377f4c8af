/*
 * engine_ref.c: a C reference implementation of the GCMC move loop of gcmc/sampling/engine.py, for
 * the speed benchmark in bench_engine.py (compiled there with the system's cc, loaded with
 * ctypes).
 *
 * It runs on the very arrays of a gcmc.simulation.Box (parameters, cell list, neighbour
 * cells, z-bin profile, slab tail table, xoshiro256** state, energy, counters), so the C and
 * the numba engines see the same cell structure, the same potentials and the same random
 * stream: from the same state they make the same moves, and agree to rounding (the pair sums
 * are reassociated by -ffast-math / numba's fastmath, so long trajectories drift apart at
 * the 1e-15 level and eventually diverge, as any two chaotic MC runs do).
 *
 * Conventions (as in gcmc/sampling/engine.py): nm, kelvin, energies E/k in K; arrays are C-contiguous
 * int64 / float64; cell_xyz[c][axis][slot] with row length `cap`; nbr[c][k] with row length
 * `nbr_w`.
 *
 * Pair loop variants (compile-time, -DPAIR_LOOP=...), all exact (same energies to rounding,
 * same overlap test); bench_engine.py times them all and compares numba with the fastest:
 *   1  two loops per cell around the excluded slot, minimum of r^2 for the overlap test:
 *      a line-by-line transcription of the original numba kernel;
 *   2  one loop per cell, the excluded slot masked by a select, overlaps counted (int);
 *   3  as 2, overlaps counted in a double;
 *   4  as 2, minimum of r^2;
 *   5  slots padded to a multiple of 8 and masked (whole vectors, no scalar remainder),
 *      overlaps counted in a double;
 *   6  as 5, minimum of r^2;
 *   7  as 5, the overlap test folded into the energy sum (the numba engine's form).
 * Everything else (moves, RNG, slab tail, cell updates) has one form, that of the engine.
 */
#include <math.h>
#include <stdint.h>

#ifndef PAIR_LOOP
#define PAIR_LOOP 7
#endif

/* fparams / iparams / counters / energy indices: must match gcmc/sampling/engine.py */
enum {
    F_LX, F_LY, F_LZ, F_INV_CX, F_INV_CY, F_INV_CZ, F_RC2, F_SIG2, F_EPS4, F_BETA, F_ZV,
    F_WALL_PRE, F_SIG_SF, F_DELTA, F_LRC_C, F_VOLUME, F_DMAX, F_P_DISPLACE, F_ROV2,
    F_INV_DZ, F_SLAB_C, F_MAX_BETA_U, N_FPARAMS
};
enum { I_NCX, I_NCY, I_NCZ, I_N, I_SLIT, I_KTRIALS, I_NBINS, I_SLAB, N_IPARAMS };
enum { C_DISP_TRY, C_DISP_ACC, C_INS_TRY, C_INS_ACC, C_DEL_TRY, C_DEL_ACC };
enum { E_FF, E_SF };
#define OVERLAP_FLAG 1.0e100

int64_t ref_layout_check(void) { return N_FPARAMS * 1000 + N_IPARAMS; }

typedef struct {
    const double *fp;
    int64_t *ip;
    double *cell_xyz;
    int64_t *cell_n, *cell_pid, *pid_cell, *pid_slot;
    const int64_t *nbr, *nbr_n;
    int64_t *zbin_n;
    const double *tail_table;
    int64_t cap, nbr_w;
} Sys;

#define XYZ(S, c, a, s) ((S)->cell_xyz[((c) * 3 + (a)) * (S)->cap + (s)])

/* ---- xoshiro256** (Blackman & Vigna, ACM TOMS 47 (2021) 36), as gcmc/sampling/rng.py */
static inline uint64_t rotl(uint64_t x, int k) { return (x << k) | (x >> (64 - k)); }

static inline uint64_t next_u64(uint64_t *s)
{
    const uint64_t result = rotl(s[1] * 5, 7) * 9;
    const uint64_t t = s[1] << 17;
    s[2] ^= s[0];
    s[3] ^= s[1];
    s[1] ^= s[2];
    s[0] ^= s[3];
    s[2] ^= t;
    s[3] = rotl(s[3], 45);
    return result;
}

static inline double uniform(uint64_t *s)
{
    return (double)(next_u64(s) >> 11) * (1.0 / 9007199254740992.0);
}

static inline int64_t below(uint64_t *s, int64_t n)
{
    int64_t k = (int64_t)(uniform(s) * (double)n);
    return k < n ? k : n - 1;
}

/* ---- potentials */
static inline double steele(double z, double pre, double s, double d)
{
    double sz2 = (s / z) * (s / z);
    double sz4 = sz2 * sz2;
    double t = z + 0.61 * d;
    double s2 = s * s;
    return pre * (0.4 * sz4 * sz4 * sz2 - sz4 - s2 * s2 / (3.0 * d * t * t * t));
}

static inline double wall_energy(double z, const double *fp, const int64_t *ip)
{
    if (ip[I_SLIT] == 0)
        return 0.0;
    return steele(z, fp[F_WALL_PRE], fp[F_SIG_SF], fp[F_DELTA])
         + steele(fp[F_LZ] - z, fp[F_WALL_PRE], fp[F_SIG_SF], fp[F_DELTA]);
}

static inline int64_t imin(int64_t a, int64_t b) { return a < b ? a : b; }
static inline int64_t imax(int64_t a, int64_t b) { return a > b ? a : b; }

static inline int64_t cell_of(double x, double y, double z, const double *fp, const int64_t *ip)
{
    int64_t ix = imin((int64_t)(x * fp[F_INV_CX]), ip[I_NCX] - 1);
    int64_t iy = imin((int64_t)(y * fp[F_INV_CY]), ip[I_NCY] - 1);
    int64_t iz = imin(imax((int64_t)(z * fp[F_INV_CZ]), 0), ip[I_NCZ] - 1);
    return (iz * ip[I_NCY] + iy) * ip[I_NCX] + ix;
}

static inline int64_t zbin_of(double z, const double *fp, const int64_t *ip)
{
    return imin(imax((int64_t)(z * fp[F_INV_DZ]), 0), ip[I_NBINS] - 1);
}

/* LJ energy of a molecule at (x, y, z) in cell c_home with all molecules within r_c, the one
 * at (skip_cell, skip_slot) excluded. Sets *overlap when a pair is closer than r_ov. */
static double pair_energy(const Sys *S, double x, double y, double z, int64_t c_home,
                          int64_t skip_cell, int64_t skip_slot, int *overlap)
{
    const double *fp = S->fp;
    const double lx = fp[F_LX], ly = fp[F_LY], lz = fp[F_LZ];
    const double ilx = 1.0 / lx, ily = 1.0 / ly, ilz = 1.0 / lz;
    const double rc2 = fp[F_RC2], sig2 = fp[F_SIG2], rov2 = fp[F_ROV2];
    const double pz = 1.0 - (double)S->ip[I_SLIT];
    const int64_t nn = S->nbr_n[c_home];
    const int64_t *nb = S->nbr + c_home * S->nbr_w;
    double acc = 0.0;
    for (int64_t k = 0; k < nn; k++) {
        const int64_t c = nb[k];
        const int64_t n = S->cell_n[c];
        const double *restrict cx = &XYZ(S, c, 0, 0);
        const double *restrict cy = &XYZ(S, c, 1, 0);
        const double *restrict cz = &XYZ(S, c, 2, 0);
        double e = 0.0;
#if PAIR_LOOP == 1
        int64_t lo = n, hi = n;
        if (c == skip_cell) {
            lo = skip_slot;
            hi = skip_slot + 1;
        }
        double rmin = 1.0e30;
        for (int64_t j = 0; j < lo; j++) {
            double dx = x - cx[j], dy = y - cy[j], dz = z - cz[j];
            dx -= lx * floor(dx * ilx + 0.5);
            dy -= ly * floor(dy * ily + 0.5);
            dz -= pz * lz * floor(dz * ilz + 0.5);
            double r2 = dx * dx + dy * dy + dz * dz;
            double s2 = sig2 / r2, s6 = s2 * s2 * s2;
            e += r2 < rc2 ? s6 * s6 - s6 : 0.0;
            rmin = r2 < rmin ? r2 : rmin;
        }
        for (int64_t j = hi; j < n; j++) {
            double dx = x - cx[j], dy = y - cy[j], dz = z - cz[j];
            dx -= lx * floor(dx * ilx + 0.5);
            dy -= ly * floor(dy * ily + 0.5);
            dz -= pz * lz * floor(dz * ilz + 0.5);
            double r2 = dx * dx + dy * dy + dz * dz;
            double s2 = sig2 / r2, s6 = s2 * s2 * s2;
            e += r2 < rc2 ? s6 * s6 - s6 : 0.0;
            rmin = r2 < rmin ? r2 : rmin;
        }
        if (rmin < rov2) {
            *overlap = 1;
            return 0.0;
        }
#elif PAIR_LOOP == 2 || PAIR_LOOP == 3 || PAIR_LOOP == 4
        const int64_t skip = c == skip_cell ? skip_slot : -1;
#if PAIR_LOOP == 2
        int64_t nov = 0;
#elif PAIR_LOOP == 3
        double nov = 0.0;
#else
        double rmin = 1.0e30;
#endif
        for (int64_t j = 0; j < n; j++) {
            double dx = x - cx[j], dy = y - cy[j], dz = z - cz[j];
            dx -= lx * floor(dx * ilx + 0.5);
            dy -= ly * floor(dy * ily + 0.5);
            dz -= pz * lz * floor(dz * ilz + 0.5);
            double r2 = dx * dx + dy * dy + dz * dz;
            r2 = j == skip ? 1.0e30 : r2;
            double s2 = sig2 / r2, s6 = s2 * s2 * s2;
            e += r2 < rc2 ? s6 * s6 - s6 : 0.0;
#if PAIR_LOOP == 2
            nov += r2 < rov2;
#elif PAIR_LOOP == 3
            nov += r2 < rov2 ? 1.0 : 0.0;
#else
            rmin = r2 < rmin ? r2 : rmin;
#endif
        }
#if PAIR_LOOP == 4
        if (rmin < rov2) {
#else
        if (nov > 0) {
#endif
            *overlap = 1;
            return 0.0;
        }
#elif PAIR_LOOP == 7
        /* as 5, with the overlap test folded into the energy sum: an overlapping pair adds
         * OVERLAP_FLAG (1e100), which no sum of non-overlapping pairs can reach */
        const int64_t skip = c == skip_cell ? skip_slot : -1;
        const int64_t m = (n + 7) & ~(int64_t)7;
        for (int64_t j = 0; j < m; j++) {
            double dx = x - cx[j], dy = y - cy[j], dz = z - cz[j];
            dx -= lx * floor(dx * ilx + 0.5);
            dy -= ly * floor(dy * ily + 0.5);
            dz -= pz * lz * floor(dz * ilz + 0.5);
            double r2 = dx * dx + dy * dy + dz * dz;
            r2 = (j == skip) | (j >= n) ? 1.0e30 : r2;
            double s2 = sig2 / r2, s6 = s2 * s2 * s2;
            const double u = r2 < rc2 ? s6 * s6 - s6 : 0.0;
            e += r2 < rov2 ? OVERLAP_FLAG : u; /* u may be inf/NaN at r = 0: not added */
        }
        if (e >= 0.5 * OVERLAP_FLAG) {
            *overlap = 1;
            return 0.0;
        }
#elif PAIR_LOOP == 5 || PAIR_LOOP == 6
        /* slots padded to a multiple of 8 (the cell capacity leaves room), the padding
         * masked like the excluded slot: whole vectors, no scalar remainder */
        const int64_t skip = c == skip_cell ? skip_slot : -1;
        const int64_t m = (n + 7) & ~(int64_t)7;
#if PAIR_LOOP == 5
        double nov = 0.0;
#else
        double rmin = 1.0e30;
#endif
        for (int64_t j = 0; j < m; j++) {
            double dx = x - cx[j], dy = y - cy[j], dz = z - cz[j];
            dx -= lx * floor(dx * ilx + 0.5);
            dy -= ly * floor(dy * ily + 0.5);
            dz -= pz * lz * floor(dz * ilz + 0.5);
            double r2 = dx * dx + dy * dy + dz * dz;
            r2 = (j == skip) | (j >= n) ? 1.0e30 : r2;
            double s2 = sig2 / r2, s6 = s2 * s2 * s2;
            e += r2 < rc2 ? s6 * s6 - s6 : 0.0;
#if PAIR_LOOP == 5
            nov += r2 < rov2 ? 1.0 : 0.0;
#else
            rmin = r2 < rmin ? r2 : rmin;
#endif
        }
#if PAIR_LOOP == 6
        if (rmin < rov2) {
#else
        if (nov > 0) {
#endif
            *overlap = 1;
            return 0.0;
        }
#else
#error "PAIR_LOOP must be 1..7"
#endif
        acc += e;
    }
    *overlap = 0;
    return fp[F_EPS4] * acc;
}

static double slab_tail_sum(int64_t b, const int64_t *zbin_n, const double *tail, int64_t nbins)
{
    /* two contiguous runs (bins at and below b, bins above), as gcmc/sampling/engine.py */
    double acc = 0.0;
    for (int64_t bb = 0; bb <= b; bb++)
        acc += (double)zbin_n[b - bb] * tail[bb];
    for (int64_t bb = 1; bb < nbins - b; bb++)
        acc += (double)zbin_n[b + bb] * tail[bb];
    return acc;
}

static double insertion_tail(const Sys *S, int64_t b, int64_t n_now)
{
    const double *fp = S->fp;
    const int64_t *ip = S->ip;
    if (ip[I_SLIT] == 0)
        return (2.0 * (double)n_now + 1.0) * fp[F_LRC_C] / fp[F_VOLUME];
    if (ip[I_SLAB] == 0)
        return 0.0;
    return fp[F_SLAB_C] * (double)n_now + slab_tail_sum(b, S->zbin_n, S->tail_table, ip[I_NBINS]);
}

/* energy of adding a molecule at (x, y, z), the one at (skip_cell, skip_slot, skip_bin)
 * excluded; returns 1 on overlap */
static int trial_energy(const Sys *S, double x, double y, double z, int64_t skip_cell,
                        int64_t skip_slot, int64_t n_others, int64_t skip_bin, double *dff,
                        double *dsf)
{
    const double *fp = S->fp;
    const int64_t *ip = S->ip;
    double usf = wall_energy(z, fp, ip);
    *dff = 0.0;
    *dsf = 0.0;
    if (usf * fp[F_BETA] > fp[F_MAX_BETA_U])
        return 1;
    int64_t c = cell_of(x, y, z, fp, ip);
    int ov;
    double uff = pair_energy(S, x, y, z, c, skip_cell, skip_slot, &ov);
    if (ov)
        return 1;
    int64_t b = zbin_of(z, fp, ip);
    double tail = insertion_tail(S, b, n_others);
    if (skip_cell >= 0 && ip[I_SLIT] == 1 && ip[I_SLAB] == 1) {
        int64_t d = b - skip_bin;
        d = d < 0 ? -d : d;
        tail -= S->tail_table[d];
    }
    *dff = uff + tail;
    *dsf = usf;
    return 0;
}

static void add_molecule(Sys *S, double x, double y, double z)
{
    int64_t i = S->ip[I_N];
    int64_t c = cell_of(x, y, z, S->fp, S->ip);
    int64_t s = S->cell_n[c];
    XYZ(S, c, 0, s) = x;
    XYZ(S, c, 1, s) = y;
    XYZ(S, c, 2, s) = z;
    S->cell_pid[c * S->cap + s] = i;
    S->cell_n[c] = s + 1;
    S->pid_cell[i] = c;
    S->pid_slot[i] = s;
    S->zbin_n[zbin_of(z, S->fp, S->ip)] += 1;
    S->ip[I_N] = i + 1;
}

static void remove_molecule(Sys *S, int64_t i)
{
    int64_t c = S->pid_cell[i], s = S->pid_slot[i];
    S->zbin_n[zbin_of(XYZ(S, c, 2, s), S->fp, S->ip)] -= 1;
    int64_t last = S->cell_n[c] - 1;
    if (s != last) {
        XYZ(S, c, 0, s) = XYZ(S, c, 0, last);
        XYZ(S, c, 1, s) = XYZ(S, c, 1, last);
        XYZ(S, c, 2, s) = XYZ(S, c, 2, last);
        int64_t j = S->cell_pid[c * S->cap + last];
        S->cell_pid[c * S->cap + s] = j;
        S->pid_slot[j] = s;
    }
    S->cell_n[c] = last;
    int64_t n_last = S->ip[I_N] - 1;
    if (i != n_last) {
        int64_t c2 = S->pid_cell[n_last], s2 = S->pid_slot[n_last];
        S->cell_pid[c2 * S->cap + s2] = i;
        S->pid_cell[i] = c2;
        S->pid_slot[i] = s2;
    }
    S->ip[I_N] = n_last;
}

static inline double wrap(double v, double length)
{
    if (v >= length)
        v -= length;
    else if (v < 0.0)
        v += length;
    return v;
}

#define KMAX 4096

/* Run n_moves trial moves (see gcmc.engine.run_moves; sampling omitted: the benchmark does
 * not sample). Returns 0, or -1 if k_trials exceeds KMAX. */
int64_t ref_run_moves(int64_t n_moves, const double *fp, int64_t *ip, double *cell_xyz,
                      int64_t *cell_n, int64_t *cell_pid, int64_t *pid_cell, int64_t *pid_slot,
                      const int64_t *nbr, const int64_t *nbr_n, int64_t *zbin_n,
                      const double *tail_table, uint64_t *rng, double *energy,
                      int64_t *counters, int64_t cap, int64_t nbr_w)
{
    Sys sys = {fp, ip, cell_xyz, cell_n, cell_pid, pid_cell, pid_slot, nbr, nbr_n, zbin_n,
               tail_table, cap, nbr_w};
    Sys *S = &sys;
    const double lx = fp[F_LX], ly = fp[F_LY], lz = fp[F_LZ];
    const double beta = fp[F_BETA], zv = fp[F_ZV], dmax = fp[F_DMAX];
    const double p_disp = fp[F_P_DISPLACE], max_bu = fp[F_MAX_BETA_U];
    const int slit = ip[I_SLIT] == 1;
    const int64_t k_trials = ip[I_KTRIALS], nbins = ip[I_NBINS];
    double tx[KMAX], ty[KMAX], tz[KMAX], tw[KMAX], tff[KMAX], tsf[KMAX];
    if (k_trials > KMAX)
        return -1;
    for (int64_t move = 0; move < n_moves; move++) {
        const int64_t n = ip[I_N];
        const double r = uniform(rng);
        if (r < p_disp) {
            /* ---- displacement */
            if (n > 0) {
                counters[C_DISP_TRY] += 1;
                int64_t i = below(rng, n);
                int64_t c = pid_cell[i], s = pid_slot[i];
                double x0 = XYZ(S, c, 0, s), y0 = XYZ(S, c, 1, s), z0 = XYZ(S, c, 2, s);
                double x1 = wrap(x0 + dmax * (2.0 * uniform(rng) - 1.0), lx);
                double y1 = wrap(y0 + dmax * (2.0 * uniform(rng) - 1.0), ly);
                double z1 = z0 + dmax * (2.0 * uniform(rng) - 1.0);
                int ok = 1;
                if (slit) {
                    if (z1 <= 0.0 || z1 >= lz)
                        ok = 0;
                } else {
                    z1 = wrap(z1, lz);
                }
                double usf1 = 0.0, uff1 = 0.0;
                int64_t c1 = 0;
                if (ok) {
                    usf1 = wall_energy(z1, fp, ip);
                    if (usf1 * beta > max_bu)
                        ok = 0;
                }
                if (ok) {
                    int ov;
                    c1 = cell_of(x1, y1, z1, fp, ip);
                    uff1 = pair_energy(S, x1, y1, z1, c1, c, s, &ov);
                    if (ov)
                        ok = 0;
                }
                if (ok) {
                    int ov;
                    double uff0 = pair_energy(S, x0, y0, z0, c, c, s, &ov);
                    double usf0 = wall_energy(z0, fp, ip);
                    double dtail = 0.0;
                    int64_t b0 = zbin_of(z0, fp, ip), b1 = zbin_of(z1, fp, ip);
                    if (slit && ip[I_SLAB] == 1 && b0 != b1) {
                        int64_t db = b1 - b0;
                        db = db < 0 ? -db : db;
                        dtail = slab_tail_sum(b1, zbin_n, tail_table, nbins)
                              - slab_tail_sum(b0, zbin_n, tail_table, nbins)
                              - (tail_table[db] - tail_table[0]);
                    }
                    double dff = uff1 - uff0 + dtail;
                    double dsf = usf1 - usf0;
                    double du = dff + dsf;
                    if (du <= 0.0 || uniform(rng) < exp(-beta * du)) {
                        counters[C_DISP_ACC] += 1;
                        energy[E_FF] += dff;
                        energy[E_SF] += dsf;
                        if (c1 == c) {
                            XYZ(S, c, 0, s) = x1;
                            XYZ(S, c, 1, s) = y1;
                            XYZ(S, c, 2, s) = z1;
                            zbin_n[b0] -= 1;
                            zbin_n[b1] += 1;
                        } else {
                            remove_molecule(S, i);
                            add_molecule(S, x1, y1, z1);
                        }
                    }
                }
            }
        } else if (uniform(rng) < 0.5) {
            /* ---- insertion with k trial positions */
            counters[C_INS_TRY] += 1;
            double wsum = 0.0;
            for (int64_t t = 0; t < k_trials; t++) {
                double x = uniform(rng) * lx;
                double y = uniform(rng) * ly;
                double z = uniform(rng) * lz;
                tx[t] = x;
                ty[t] = y;
                tz[t] = z;
                double dff, dsf;
                int ov = trial_energy(S, x, y, z, -1, -1, n, -1, &dff, &dsf);
                double w = 0.0;
                if (!ov) {
                    double bu = beta * (dff + dsf);
                    if (bu < max_bu)
                        w = exp(-bu);
                }
                tw[t] = w;
                tff[t] = dff;
                tsf[t] = dsf;
                wsum += w;
            }
            if (wsum > 0.0) {
                int64_t pick = 0;
                if (k_trials > 1) {
                    double target = uniform(rng) * wsum;
                    double cum = 0.0;
                    pick = k_trials - 1;
                    for (int64_t t = 0; t < k_trials; t++) {
                        cum += tw[t];
                        if (cum > target && tw[t] > 0.0) {
                            pick = t;
                            break;
                        }
                    }
                    while (tw[pick] == 0.0)
                        pick -= 1;
                }
                double acc = zv * wsum / ((double)k_trials * ((double)n + 1.0));
                if (acc >= 1.0 || uniform(rng) < acc) {
                    counters[C_INS_ACC] += 1;
                    energy[E_FF] += tff[pick];
                    energy[E_SF] += tsf[pick];
                    add_molecule(S, tx[pick], ty[pick], tz[pick]);
                }
            }
        } else {
            /* ---- deletion (with k - 1 trial positions when biased) */
            counters[C_DEL_TRY] += 1;
            if (n > 0) {
                int64_t i = below(rng, n);
                int64_t c = pid_cell[i], s = pid_slot[i];
                double x0 = XYZ(S, c, 0, s), y0 = XYZ(S, c, 1, s), z0 = XYZ(S, c, 2, s);
                int64_t b0 = zbin_of(z0, fp, ip);
                double dff0, dsf0;
                trial_energy(S, x0, y0, z0, c, s, n - 1, b0, &dff0, &dsf0);
                double wsum = exp(-beta * (dff0 + dsf0));
                for (int64_t t = 0; t < k_trials - 1; t++) {
                    double x = uniform(rng) * lx;
                    double y = uniform(rng) * ly;
                    double z = uniform(rng) * lz;
                    double dff, dsf;
                    int ov = trial_energy(S, x, y, z, c, s, n - 1, b0, &dff, &dsf);
                    if (!ov) {
                        double bu = beta * (dff + dsf);
                        if (bu < max_bu)
                            wsum += exp(-bu);
                    }
                }
                double acc = (double)k_trials * (double)n / (zv * wsum);
                if (acc >= 1.0 || uniform(rng) < acc) {
                    counters[C_DEL_ACC] += 1;
                    energy[E_FF] -= dff0;
                    energy[E_SF] -= dsf0;
                    remove_molecule(S, i);
                }
            }
        }
    }
    return 0;
}
