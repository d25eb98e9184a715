/*
 * Compiled kernels of bhgrow's engine, one halo (or node, or key) at a time.
 *
 * advance_halos: the coupled gas-hole solver of bhgrow/physics/coupled.py (its array code,
 *   ``_advance``, is the reference): piecewise closed-form Eddington and Bondi phases, the
 *   switch roots by safeguarded Newton iteration (Press et al. 2007, sect. 9.4), the
 *   a-posteriori Bondi step control. Same formulas, same order of operations, same constants
 *   (passed in by bhgrow/_kernels.py from coupled.py).
 * quiet_step: the reservoir step of halos without a black hole,
 *   StarFormation._evolve of bhgrow/physics/gas.py without the metal-flow integrals
 *   (instantaneous recycling, Tinsley 1980; mass loading, Cole et al. 2000; phi-functions,
 *   Hochbruck & Ostermann 2010), with the series coefficients passed in from gas.py.
 * smooth_growth: the engine's smooth accretion of each snapshot's main progenitors
 *   (bhgrow/engine.py, step 1), summed in numpy's order.
 * splitmix: bhgrow/rng.py's counter-based draws, stream_keys and uniform (SplitMix64,
 *   Steele, Lea & Flood 2014), bit for bit.
 *
 * Why compiled: the solver's work is per halo and sequential (phases, substeps and root
 * iterations whose number differs from halo to halo); as arrays it ran ~17 passes per
 * snapshot, most over a few halos, each a few hundred small numpy calls.
 *
 * numpy's maximum, minimum and clip pass NaN through; vmax, vmin and vclip below do the same,
 * so the branches taken on NaN are those of the array code. Division by zero and logarithms
 * of negative numbers give IEEE inf/NaN as numpy's do (with its warnings silenced). Build
 * without floating-point contraction (setup.py: -ffp-contract=off), so a*b + c rounds twice
 * as it does in numpy.
 *
 * Every halo's result depends on its own inputs alone. The loops release the GIL.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>

typedef struct {
    double tol;      /* _EDD_TOL */
    double m_tol;    /* _EXP_M_TOL = e^-tol */
    double p_tol;    /* _EXP_P_TOL = e^+tol */
    double margin;   /* _RUNAWAY_MARGIN */
    double sx;       /* _SERIES_X */
    double share;    /* _DRAIN_SHARE */
    double safety;   /* _STEP_SAFETY */
    double phases;   /* _MAX_PHASES */
    int iters;       /* _ROOT_ITERS */
    int polish;      /* _POLISH_STEPS */
} Consts;

enum { EDD_ROOT = 0, RUNAWAY_ROOT = 1 };

static inline double vmax(double x, double y) {
    if (x != x || y != y) return x + y;
    return x >= y ? x : y;
}

static inline double vmin(double x, double y) {
    if (x != x || y != y) return x + y;
    return x <= y ? x : y;
}

static inline double vclip(double x, double lo, double hi) { return vmin(vmax(x, lo), hi); }

static inline double series_phi1(double v) {
    return 1.0 + v * (-1.0 / 2 + v * (1.0 / 6 + v * (-1.0 / 24 + v * (1.0 / 120 + v * (
        -1.0 / 720 + v / 5040)))));
}

static inline double series_phi2(double v) {
    return 0.5 + v * (-1.0 / 6 + v * (1.0 / 24 + v * (-1.0 / 120 + v * (1.0 / 720 + v * (
        -1.0 / 5040 + v / 40320)))));
}

static inline double series_psi(double v) {
    return 0.5 + v * (-1.0 / 3 + v * (1.0 / 8 + v * (-1.0 / 30 + v * (1.0 / 144 + v * (
        -1.0 / 840 + v / 5760)))));
}

static inline double series_q(double v) {
    return 0.5 + v * (1.0 / 6 + v * (1.0 / 24 + v * (1.0 / 120 + v * (1.0 / 720 + v * (
        1.0 / 5040 + v / 40320)))));
}

static inline double phi1(double x, double e, const Consts *K) {
    return fabs(x) < K->sx ? series_phi1(x) : (1.0 - e) / x;
}

static inline double phi2(double x, double e, const Consts *K) {
    return fabs(x) < K->sx ? series_phi2(x) : (x - 1.0 + e) / (x * x);
}

static inline double psi(double x, double e, const Consts *K) {
    return fabs(x) < K->sx ? series_psi(x) : (1.0 - (1.0 + x) * e) / (x * x);
}

/* e^-x, phi1(x), phi2(x) from one exponential */
static inline void exp_phi12(double x, const Consts *K, double *e, double *f1, double *f2) {
    *e = exp(-x);
    if (fabs(x) < K->sx) {
        *f1 = series_phi1(x);
        *f2 = series_phi2(x);
    } else {
        *f1 = (1.0 - *e) / x;
        *f2 = (1.0 - *f1) / x;
    }
}

/* gas after t of an Eddington phase (exact), and e^{bt} */
static inline double eddington_gas_at(double g0, double m0, double inflow, double a, double b,
                                      double pe, double t, const Consts *K, double *ebt,
                                      double *f1a, double *e_at) {
    double at = a * t, bt = b * t;
    *e_at = exp(-at);
    *f1a = phi1(at, *e_at, K);
    *ebt = exp(bt);
    return g0 * *e_at + inflow * t * *f1a
           - pe * m0 * t * *ebt * phi1(at + bt, *e_at / *ebt, K);
}

/* gas, its integral and the hole mass after t of an Eddington phase */
static inline void eddington_gas(double g0, double m0, double inflow, double a, double k,
                                 double e, double p, double t, const Consts *K, double *g,
                                 double *gi, double *m) {
    double b = k * e, pe = p * e, ebt, f1a, e_at;
    *g = eddington_gas_at(g0, m0, inflow, a, b, pe, t, K, &ebt, &f1a, &e_at);
    double f2a = phi2(a * t, e_at, K);
    double bt = b * t;
    double q = fabs(bt) < K->sx ? series_q(bt) : (ebt - 1.0 - bt) / (bt * bt);
    double drain = t * t * (b * q + a * f2a) / (a + b);
    *gi = g0 * t * f1a + inflow * t * t * f2a - p * e * m0 * drain;
    *m = m0 * ebt;
}

/* gas, its integral, the gas accreted, the loss rate and e^{-lam t} with the hole frozen at
 * mbar (lam < 0: computed here) */
static inline void bondi_phase(double g0, double inflow, double a, double bpg, double p,
                               double t, double mbar, double lam, const Consts *K, double *g,
                               double *gi, double *acc, double *lam_out, double *e_out) {
    double cc = bpg * mbar * mbar, e, f1, f2;
    if (lam < 0.0) lam = a + p * cc;
    exp_phi12(lam * t, K, &e, &f1, &f2);
    *g = g0 * e + inflow * t * f1;
    *gi = g0 * t * f1 + inflow * t * t * f2;
    *acc = cc * *gi;
    *lam_out = lam;
    *e_out = e;
}

static inline double bondi_mass(double m0, double k, double bpg, double gi) {
    double d = k * bpg * m0 * gi;
    return m0 / vmax(1.0 - d, 1e-12);
}

/* np.minimum(x, m e^{kt}), e^{kt} only where x may reach it (m (1 + kt) <= m e^{kt}) */
static inline double cap(double x, double m, double kt) {
    if (x < 0.9999999 * (m * (1.0 + kt))) return x;
    return vmin(x, m * exp(kt));
}

static inline double bondi_switch_time(double g0, double inflow, double bpg, double edd,
                                       double mbar, double t, double lam) {
    double g_eq = inflow / lam;
    double g_star = edd / (bpg * mbar);
    double out = t;
    if (g_eq > g_star && g0 < g_star && lam > 0)
        out = vclip(log((g_eq - g0) / (g_eq - g_star)) / lam, 0.0, t);
    if (lam <= 0 && inflow > 0 && g0 < g_star)
        out = vclip((g_star - g0) / inflow, 0.0, t);
    return out;
}

/* a root's cheap closed form (f, f') */
static inline void cheap(int kind, double u, const double *c, double *f, double *df) {
    if (kind == EDD_ROOT) {       /* q, cq, k_q, mid, a, b */
        double e_a = exp(-c[4] * u), e_b = exp(c[5] * u);
        *f = c[0] + c[1] * e_a - c[2] * e_b - c[3] / e_b;
        *df = -c[4] * c[1] * e_a - c[5] * c[2] * e_b + c[5] * c[3] / e_b;
    } else {                      /* g_eq, d, lam, h, inv_m0, kb */
        double e = exp(-c[2] * u);
        double g = c[0] + c[1] * e;
        *f = c[3] * (c[4] - c[5] * (c[0] * u + c[1] * (1.0 - e) / c[2])) - g;
        *df = -c[3] * c[5] * g + c[2] * c[1] * e;
    }
}

static double polish(int kind, double s0, double lo, double hi, int valid, const double *c,
                     const Consts *K) {
    double s = s0, f, df;
    for (int i = 0; i < K->polish; i++) {
        cheap(kind, s, c, &f, &df);
        if (f >= 0.0) lo = s; else hi = s;
        double nxt = s - f / df;
        s = (nxt >= lo && nxt <= hi) ? nxt : 0.5 * (lo + hi);
    }
    return (valid && isfinite(s)) ? s : s0;
}

/* a root's exact (f, f', band) */
static inline void fdf(int kind, double s, const double *c, const Consts *K, double *f,
                       double *df, double *band) {
    if (kind == EDD_ROOT) {       /* g0, m0, inflow, a, b, pe, star */
        double ebt, f1a, e_at;
        double g = eddington_gas_at(c[0], c[1], c[2], c[3], c[4], c[5], s, K, &ebt, &f1a,
                                    &e_at);
        double gs = c[6] / ebt;
        *f = g - gs;
        *df = c[2] - c[3] * g - c[5] * c[1] * ebt + c[4] * gs;
        *band = K->tol / (1.0 - K->tol) * gs;
    } else {                      /* g0, inv_m0, inflow, lam, kb, e_b */
        double e, f1, f2;
        exp_phi12(c[3] * s, K, &e, &f1, &f2);
        double g = c[0] * e + c[2] * s * f1;
        double gi = c[0] * s * f1 + c[2] * s * s * f2;
        double inv_m = c[1] - c[4] * gi;
        *f = c[5] * inv_m - g;
        *df = -c[5] * c[4] * g - (c[2] - c[3] * g);
        *band = K->tol / (1.0 + K->tol) * c[5] * inv_m;
    }
}

/* safeguarded Newton of coupled._newton, one root: f(lo) >= 0 > f(hi), first point s */
static double newton(int kind, double lo, double hi, double s, const double *c,
                     const Consts *K) {
    double f, df, band;
    for (int i = 0; i < K->iters; i++) {
        fdf(kind, s, c, K, &f, &df, &band);
        int up = f >= 0.0;
        if (up && f <= band) return s;
        double nxt = s - (f - 0.5 * band) / df;
        if (up) lo = s; else hi = s;
        s = (nxt > lo && nxt < hi) ? nxt : 0.5 * (lo + hi);
    }
    return lo;
}

static double eddington_end(double g0, double m0, double inflow, double a, double k,
                            double edd, double bpg, double p, double t, const Consts *K) {
    double star = (1.0 - K->tol) * edd / (bpg * m0);
    double b = k * edd, pe = p * edd;
    double mid = star * (1.0 + 0.5 * K->tol / (1.0 - K->tol));
    double drain = pe * m0;
    double g_eq = (inflow - drain) / a;
    double nxt = log((g0 - g_eq) / (mid - g_eq)) / a;
    double slope = -drain * b / a;
    double base = g_eq + drain * b / (a * a);
    double ref = log((g0 - base) / (mid * exp(-b * nxt) - slope * nxt - base)) / a;
    if (isfinite(ref) && ref > 0.0) nxt = ref;
    double newton_pt = -(g0 - mid) / (inflow - a * g0 - drain + b * star);
    if (!(isfinite(nxt) && nxt > 0.0)) nxt = newton_pt;
    double k_q = drain / (a + b);
    double q = inflow / a;
    double cq = g0 - q + k_q;
    if (cq < 0.0 && a > 0.0) {
        double w = (q + sqrt(q * q - 4.0 * k_q * mid)) / (2.0 * k_q);
        double quasi = log(w) / b;
        if (isfinite(quasi) && quasi > 0.0) nxt = quasi;
    }
    double s0 = (nxt > 0.0 && nxt < t) ? nxt : 0.5 * t;
    double cc[7] = {q, cq, k_q, mid, a, b, 0.0};
    s0 = polish(EDD_ROOT, s0, 0.0, t, a > 0.0, cc, K);
    double ce[7] = {g0, m0, inflow, a, b, pe, star};
    return newton(EDD_ROOT, 0.0, t, s0, ce, K);
}

static double bondi_runaway(double g0, double m0, double inflow, double a, double k,
                            double edd, double bpg, double p, double t, double mbar,
                            double g_t, double gi_t, const Consts *K) {
    double lam = a + p * bpg * mbar * mbar;
    double e_b = (1.0 + K->tol) * edd / bpg;
    double inv_m0 = 1.0 / m0, kb = k * bpg;
    double f_lo = e_b * inv_m0 - g0, f_hi = e_b * (inv_m0 - kb * gi_t) - g_t;
    double s0 = t * vclip(f_lo / (f_lo - f_hi), 0.0, 1.0);
    double g_eq = inflow / lam;
    double d = g0 - g_eq;
    double h = (1.0 - 0.5 * K->tol / (1.0 + K->tol)) * e_b;
    double cc[7] = {g_eq, d, lam, h, inv_m0, kb, 0.0};
    s0 = polish(RUNAWAY_ROOT, s0, 0.0, t, lam > 0.0, cc, K);
    double ce[7] = {g0, inv_m0, inflow, lam, kb, e_b, 0.0};
    return newton(RUNAWAY_ROOT, 0.0, t, s0, ce, K);
}

/* one halo over its interval `left` (the loop of coupled._advance, one halo) */
static void halo(double g, double z, double m, double inflow, double a, double bpg,
                 double edd, double k, double p, double mu_rate, double left, double steps,
                 double max_dlnm, double rate, const Consts *K, double *res) {
    double h_bondi = left / steps;
    double limit = 2.0 * steps + K->phases;
    double count = 0.0, acc = 0.0, gint = 0.0;
    double d1, d2, d3, d4;                          /* unused outputs */
    while (left > 0) {
        double t = left;
        int last = count >= limit;
        double g1, z1, m1, a1, gi1, used;
        if (bpg * g * m >= edd && !last) {
            /* Eddington phase: exact; ends where the reservoir can no longer feed e M */
            double ge, gie, me, te = t;
            eddington_gas(g, m, inflow, a, k, edd, p, t, K, &ge, &gie, &me);
            if (bpg * ge * me < K->m_tol * edd) {
                te = eddington_end(g, m, inflow, a, k, edd, bpg, p, t, K);
                eddington_gas(g, m, inflow, a, k, edd, p, te, K, &ge, &gie, &me);
            }
            ge = vmax(ge, 0.0);
            double acc_e = m * expm1(k * edd * te) / k;
            me = m + k * acc_e;
            double mu0 = g > 0 ? z / g : 0.0;
            double x = gie > 0 ? inflow * te * te / gie : 0.0;
            double e_x = exp(-x);
            double mu1 = mu0 * e_x + mu_rate * te * phi1(x, e_x, K);
            z1 = vmin(mu1 * ge, z + mu_rate * gie);
            g1 = ge; m1 = me; a1 = acc_e; gi1 = gie; used = te;
        } else {
            /* Bondi phase: hole frozen at the geometric mean of its end masses */
            double lam0 = a + p * (bpg * m * m);
            double tb = last ? t : bondi_switch_time(g, inflow, bpg, edd, m, vmin(t, h_bondi),
                                                     lam0);
            double kt = k * edd * tb;
            double gb, gib, m1b, accb, lam, e_lam;
            int guess = isfinite(rate) && !last;
            if (guess) {
                /* e^{rate tb} <= e^{kt} where rate tb <= kt: the cap then needs no e^{kt} */
                double m_rate = m * exp(rate * tb);
                double m_pred = sqrt(m * (rate * tb <= kt ? m_rate : cap(m_rate, m, kt)));
                bondi_phase(g, inflow, a, bpg, p, tb, m_pred, -1.0, K, &gb, &gib, &d1, &d2,
                            &d3);
                m1b = bondi_mass(m, k, bpg, gib);
                if (bpg * gb * m1b > K->margin * edd) {
                    bondi_phase(g, inflow, a, bpg, p, tb, m, -1.0, K, &gb, &gib, &d1, &d2,
                                &d3);
                    m1b = bondi_mass(m, k, bpg, gib);
                    guess = 0;
                }
            } else {
                bondi_phase(g, inflow, a, bpg, p, tb, m, lam0, K, &gb, &gib, &d1, &d2, &d3);
                m1b = bondi_mass(m, k, bpg, gib);
            }
            if (bpg * gb * m1b > K->p_tol * edd && !last && !guess) {
                tb = bondi_runaway(g, m, inflow, a, k, edd, bpg, p, tb, m, gb, gib, K);
                kt = k * edd * tb;
                bondi_phase(g, inflow, a, bpg, p, tb, m, -1.0, K, &gb, &gib, &d1, &d2, &d3);
                m1b = bondi_mass(m, k, bpg, gib);
            }
            double mbar = sqrt(m * cap(m1b, m, kt));
            if (!guess) {
                double gic;
                bondi_phase(g, inflow, a, bpg, p, tb, mbar, -1.0, K, &d1, &gic, &d2, &d3,
                            &d4);
                mbar = sqrt(m * cap(bondi_mass(m, k, bpg, gic), m, kt));
            }
            bondi_phase(g, inflow, a, bpg, p, tb, mbar, -1.0, K, &gb, &gib, &accb, &lam,
                        &e_lam);
            if (last) {
                double over = vmax(accb - m * expm1(kt) / k, 0.0);
                accb = accb - over;
                gb = gb + p * over;
            }
            double x = lam * tb;
            z1 = z * e_lam + mu_rate * (g * tb * e_lam + inflow * tb * tb * psi(x, e_lam, K));
            if (t - tb > 1e-12 * t && !last) {
                double dl = log1p(k * accb / m);
                int pos = tb > 0;
                rate = pos ? dl / tb : NAN;
                if (max_dlnm > 0 && pos && tb >= h_bondi * (1.0 - 1e-12)) {
                    /* a-posteriori step control on the criteria of substeps() */
                    double pb0 = p * bpg * m * m;
                    double m_end = m + k * accb;
                    double pb1 = p * bpg * m_end * m_end;
                    double dphi = pb1 / (a + pb1) - pb0 / (a + pb0);
                    double r = vmax(dl / max_dlnm, dphi / (K->share * max_dlnm));
                    double grow = vclip(K->safety / vmax(r, 1e-300), 1.0, 2.0);
                    if (isfinite(grow)) h_bondi = h_bondi * grow;
                }
            }
            g1 = gb; m1 = m + k * accb; a1 = accb; gi1 = gib; used = tb;
        }
        double rest = t - used;
        rest = (rest > 1e-12 * t && !last) ? rest : 0.0;
        g = g1;
        z = vmax(z1, 0.0);
        m = m1;
        acc += a1;
        gint += gi1;
        left = rest;
        count += 1.0;
    }
    res[0] = g; res[1] = z; res[2] = m; res[3] = acc; res[4] = gint;
}

/* ---------------------------------------------------------------------------------------- */

static int check_len(Py_buffer *b, Py_ssize_t want, const char *name) {
    if (b->len != want) {
        PyErr_Format(PyExc_ValueError, "%s: buffer of %zd bytes, expected %zd", name, b->len,
                     want);
        return 0;
    }
    return 1;
}

#define N_ADVANCE_IN 13

static PyObject *advance_halos(PyObject *self, PyObject *args) {
    Py_buffer in[N_ADVANCE_IN], out;
    double max_dlnm;
    Consts K;
    static const char *names[N_ADVANCE_IN] = {
        "gas", "metals", "m_bh", "inflow", "loss", "bondi_per_gas", "edd", "keep",
        "per_unit", "metal_rate", "dt", "steps", "prior_rate"};
    memset(in, 0, sizeof(in));
    memset(&out, 0, sizeof(out));
    if (!PyArg_ParseTuple(args, "y*y*y*y*y*y*y*y*y*y*y*y*y*w*d(ddddddddii):advance_halos",
                          &in[0], &in[1], &in[2], &in[3], &in[4], &in[5], &in[6], &in[7],
                          &in[8], &in[9], &in[10], &in[11], &in[12], &out, &max_dlnm,
                          &K.tol, &K.m_tol, &K.p_tol, &K.margin, &K.sx, &K.share, &K.safety,
                          &K.phases, &K.iters, &K.polish))
        return NULL;
    PyObject *ret = NULL;
    Py_ssize_t n = in[0].len / (Py_ssize_t)sizeof(double);
    for (int j = 0; j < N_ADVANCE_IN; j++)
        if (!check_len(&in[j], n * (Py_ssize_t)sizeof(double), names[j])) goto done;
    if (!check_len(&out, 5 * n * (Py_ssize_t)sizeof(double), "out")) goto done;
    {
        const double *gas = in[0].buf, *metals = in[1].buf, *m_bh = in[2].buf;
        const double *inflow = in[3].buf, *loss = in[4].buf, *bpg = in[5].buf;
        const double *edd = in[6].buf, *keep = in[7].buf, *per_unit = in[8].buf;
        const double *metal_rate = in[9].buf, *dt = in[10].buf, *steps = in[11].buf;
        const double *prior = in[12].buf;
        double *o = out.buf;
        Py_BEGIN_ALLOW_THREADS
        for (Py_ssize_t i = 0; i < n; i++) {
            double res[5];
            double pr = prior[i];
            halo(gas[i], metals[i], m_bh[i], inflow[i], loss[i], bpg[i], edd[i], keep[i],
                 per_unit[i], metal_rate[i], dt[i], steps[i], max_dlnm, pr > 0 ? pr : NAN,
                 &K, res);
            for (int j = 0; j < 5; j++) o[j * n + i] = res[j];
        }
        Py_END_ALLOW_THREADS
    }
    Py_INCREF(Py_None);
    ret = Py_None;
done:
    for (int j = 0; j < N_ADVANCE_IN; j++) PyBuffer_Release(&in[j]);
    PyBuffer_Release(&out);
    return ret;
}

static inline double horner(double x, const double *c, Py_ssize_t nc) {
    double out = c[nc - 1];
    for (Py_ssize_t k = nc - 2; k >= 0; k--) out = out * x + c[k];
    return out;
}

static PyObject *quiet_step(PyObject *self, PyObject *args) {
    double eff, v0, alpha, r, yield, sx;
    Py_buffer c1, c2, cs, inflow_b, tdyn_b, vc_b, dt_b, where_b, gas_b, stars_b, metals_b,
        blown_b;
    /* (buffers only at the top level: getargs sizes its clean-up list by those) */
    if (!PyArg_ParseTuple(args, "(dddddd)y*y*y*y*y*y*y*y*w*w*w*w*:quiet_step", &eff, &v0,
                          &alpha, &r, &yield, &sx, &c1, &c2, &cs, &inflow_b, &tdyn_b, &vc_b,
                          &dt_b, &where_b, &gas_b, &stars_b, &metals_b, &blown_b))
        return NULL;
    Py_buffer *all[12] = {&c1, &c2, &cs, &inflow_b, &tdyn_b, &vc_b, &dt_b, &where_b, &gas_b,
                          &stars_b, &metals_b, &blown_b};
    PyObject *ret = NULL;
    Py_ssize_t n = where_b.len, nc = c1.len / (Py_ssize_t)sizeof(double);
    Py_ssize_t nb = n * (Py_ssize_t)sizeof(double);
    if (nc < 1 || !check_len(&c2, c1.len, "phi2 series") || !check_len(&cs, c1.len, "psi series")
        || !check_len(&inflow_b, nb, "inflow") || !check_len(&tdyn_b, nb, "t_dyn")
        || !check_len(&vc_b, nb, "v_c") || !check_len(&dt_b, nb, "dt")
        || !check_len(&gas_b, nb, "gas") || !check_len(&stars_b, nb, "stars")
        || !check_len(&metals_b, nb, "metals") || !check_len(&blown_b, nb, "blown"))
        goto done;
    {
        const double *P1 = c1.buf, *P2 = c2.buf, *PS = cs.buf;
        const double *inflow = inflow_b.buf, *t_dyn = tdyn_b.buf, *v_c = vc_b.buf;
        const double *dt_gyr = dt_b.buf;
        const unsigned char *where = where_b.buf;
        double *gas = gas_b.buf, *stars = stars_b.buf, *metals = metals_b.buf;
        double *blown = blown_b.buf;
        /* eta = (V_c / V_0)^-alpha: pow() is ~5x dearer than the rest of a halo's step,
         * so the common slopes take products (equal to round-off) */
        int a_int = alpha == 0.0 ? 0 : alpha == 1.0 ? 1 : alpha == 2.0 ? 2 : -1;
        Py_BEGIN_ALLOW_THREADS
        for (Py_ssize_t i = 0; i < n; i++) {
            if (!where[i]) continue;
            double dt = dt_gyr[i];
            double eta, u;
            switch (a_int) {
            case 0: eta = 1.0; break;
            case 1: eta = v0 / v_c[i]; break;
            case 2: u = v0 / v_c[i]; eta = u * u; break;
            default: eta = pow(v_c[i] / v0, -alpha);
            }
            double s = eff / t_dyn[i];
            double a = (1.0 - r + eta) * s;
            double x = a * dt;
            double e = exp(-x), f1, f2, ps;
            if (x < sx) {
                f1 = horner(x, P1, nc);
                f2 = horner(x, P2, nc);
                ps = horner(x, PS, nc);
            } else {
                double em1 = 1.0 - e, inv = 1.0 / x;
                f1 = em1 * inv;
                f2 = (x - em1) * (inv * inv);
                ps = (em1 - x * e) * (inv * inv);
            }
            double p = yield * (1.0 - r) * s;
            double mg0 = gas[i], inf = inflow[i];
            double mg_int = mg0 * dt * f1 + inf * dt * dt * f2;
            gas[i] = mg0 * e + inf * dt * f1;
            metals[i] = metals[i] * e + p * (mg0 * dt * e + inf * dt * dt * ps);
            stars[i] = stars[i] + (1.0 - r) * s * mg_int;
            blown[i] = eta * s * mg_int;
        }
        Py_END_ALLOW_THREADS
    }
    Py_INCREF(Py_None);
    ret = Py_None;
done:
    for (int j = 0; j < 12; j++) PyBuffer_Release(all[j]);
    return ret;
}

/* smooth_growth(start, stop, desc, main_prog, mass, prog_offsets, prog_index, out): for the
 * nodes [start, stop) that are their descendant's main progenitor, the descendant's mass
 * beyond the sum of its progenitors' (summed in the progenitor list's order, as numpy's
 * bincount does), at least 0; out[i - start], left alone elsewhere (the engine's step 1,
 * smooth accretion credited to the main progenitor). */
static PyObject *smooth_growth(PyObject *self, PyObject *args) {
    Py_ssize_t start, stop;
    Py_buffer desc_b, main_b, mass_b, off_b, idx_b, out_b;
    if (!PyArg_ParseTuple(args, "nny*y*y*y*y*w*:smooth_growth", &start, &stop, &desc_b,
                          &main_b, &mass_b, &off_b, &idx_b, &out_b))
        return NULL;
    Py_buffer *all[6] = {&desc_b, &main_b, &mass_b, &off_b, &idx_b, &out_b};
    PyObject *ret = NULL;
    Py_ssize_t n = desc_b.len / 8, n_idx = idx_b.len / 8;
    if (!check_len(&main_b, n * 8, "main_prog") || !check_len(&mass_b, n * 8, "mass")
        || !check_len(&off_b, (n + 1) * 8, "prog_offsets")
        || !check_len(&out_b, (stop - start) * 8, "out"))
        goto done;
    if (start < 0 || stop > n || start > stop) {
        PyErr_SetString(PyExc_ValueError, "smooth_growth: rows out of range");
        goto done;
    }
    {
        const int64_t *desc = desc_b.buf, *main_prog = main_b.buf, *off = off_b.buf;
        const int64_t *pidx = idx_b.buf;
        const double *mass = mass_b.buf;
        double *out = out_b.buf;
        int bad = 0;
        Py_BEGIN_ALLOW_THREADS
        for (Py_ssize_t i = start; i < stop; i++) {
            int64_t d = desc[i];
            if (d < 0) continue;
            if (d >= n || main_prog[d] != i) { bad |= d >= n; continue; }
            int64_t a = off[d], b = off[d + 1];
            if (a < 0 || b > n_idx || a > b) { bad = 1; continue; }
            double sum = 0.0;
            for (int64_t j = a; j < b; j++) {
                int64_t p = pidx[j];
                if (p < 0 || p >= n) { bad = 1; break; }
                sum += mass[p];
            }
            out[i - start] = vmax(mass[d] - sum, 0.0);
        }
        Py_END_ALLOW_THREADS
        if (bad) {
            PyErr_SetString(PyExc_ValueError, "smooth_growth: a descendant or progenitor "
                            "index lies outside the forest");
            goto done;
        }
    }
    Py_INCREF(Py_None);
    ret = Py_None;
done:
    for (int j = 0; j < 6; j++) PyBuffer_Release(all[j]);
    return ret;
}

/* SplitMix64 output function (Steele, Lea & Flood 2014), as bhgrow/rng.py's mix64 */
static inline uint64_t mix64(uint64_t x) {
    x ^= x >> 30;
    x *= 0xBF58476D1CE4E5B9ULL;
    x ^= x >> 27;
    x *= 0x94D049BB133111EBULL;
    x ^= x >> 31;
    return x;
}

/* splitmix(what, a, b, x, out), bhgrow/rng.py's counter-based draws on 64-bit values x:
 *   what 0, stream_keys: out = mix64(mix64(x ^ a) + b) (uint64; a the seed's hash, b gamma);
 *   what 1, uniform: out = top 53 bits of mix64(x + a) / 2^53 (double; a the (step, purpose)
 *   counter, b unused). */
static PyObject *splitmix(PyObject *self, PyObject *args) {
    int what;
    unsigned long long a_arg, b_arg;
    Py_buffer x_b, out_b;
    if (!PyArg_ParseTuple(args, "iKKy*w*:splitmix", &what, &a_arg, &b_arg, &x_b, &out_b))
        return NULL;
    uint64_t a = (uint64_t)a_arg, b = (uint64_t)b_arg;
    PyObject *ret = NULL;
    Py_ssize_t n = x_b.len / 8;
    if (what != 0 && what != 1) {
        PyErr_SetString(PyExc_ValueError, "splitmix: `what` must be 0 or 1");
    } else if (check_len(&out_b, n * 8, "out")) {
        const uint64_t *x = x_b.buf;
        Py_BEGIN_ALLOW_THREADS
        if (what == 0) {
            uint64_t *out = out_b.buf;
            for (Py_ssize_t i = 0; i < n; i++) out[i] = mix64(mix64(x[i] ^ a) + b);
        } else {
            double *out = out_b.buf;
            for (Py_ssize_t i = 0; i < n; i++)     /* times 2^-53, exactly */
                out[i] = (double)(mix64(x[i] + a) >> 11) * (1.0 / 9007199254740992.0);
        }
        Py_END_ALLOW_THREADS
        Py_INCREF(Py_None);
        ret = Py_None;
    }
    PyBuffer_Release(&x_b);
    PyBuffer_Release(&out_b);
    return ret;
}

static PyMethodDef methods[] = {
    {"advance_halos", advance_halos, METH_VARARGS,
     "advance_halos(gas, metals, m_bh, inflow, loss, bondi_per_gas, edd, keep, per_unit, "
     "metal_rate, dt, steps, prior_rate, out, max_dlnm, constants): the coupled solver, one "
     "halo at a time (see bhgrow/_kernels.py)."},
    {"quiet_step", quiet_step, METH_VARARGS,
     "quiet_step(params, phi1, phi2, psi, inflow, t_dyn, v_c, dt, where, gas, stars, metals, "
     "blown): "
     "the reservoir step of halos without a black hole, in place (see "
     "bhgrow/_kernels.py)."},
    {"smooth_growth", smooth_growth, METH_VARARGS,
     "smooth_growth(start, stop, desc, main_prog, mass, prog_offsets, prog_index, out): "
     "smooth accretion of the main progenitors among rows [start, stop)."},
    {"splitmix", splitmix, METH_VARARGS,
     "splitmix(what, a, b, x, out): bhgrow.rng's stream_keys (what 0) or uniform (what 1)."},
    {NULL, NULL, 0, NULL}};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_ckernels",
                                    "Compiled kernels of bhgrow's engine (see _kernels.py).",
                                    -1, methods};

/* raise it whenever a function's arguments or results change (bhgrow/_kernels.py
 * checks it, so a stale build is not used) */
#define KERNELS_VERSION 3

PyMODINIT_FUNC PyInit__ckernels(void) {
    PyObject *m = PyModule_Create(&module);
    if (m != NULL && PyModule_AddIntConstant(m, "VERSION", KERNELS_VERSION) < 0) {
        Py_DECREF(m);
        return NULL;
    }
    return m;
}
