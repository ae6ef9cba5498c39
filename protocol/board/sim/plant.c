/* plant.c - exact zero-order-hold simulation of the board-sim plant. See plant.h. */
#include "plant.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#define NA (PLANT_MAX_STATES + 1)

/* exp(M) of an n x n matrix (n <= NA) by scaling and squaring with a Taylor series. */
static void expm(int n, double m[NA][NA], double out[NA][NA])
{
    double norm = 0.0, term[NA][NA], tmp[NA][NA];
    int s = 0, i, j, k, q;
    for (i = 0; i < n; i++) {
        double row = 0.0;
        for (j = 0; j < n; j++)
            row += fabs(m[i][j]);
        if (row > norm)
            norm = row;
    }
    while (norm > 0.25) {
        norm *= 0.5;
        s++;
    }
    for (i = 0; i < n; i++)
        for (j = 0; j < n; j++) {
            m[i][j] = ldexp(m[i][j], -s);
            out[i][j] = (i == j) ? 1.0 : 0.0;
            term[i][j] = out[i][j];
        }
    for (q = 1; q <= 20; q++) {
        for (i = 0; i < n; i++)
            for (j = 0; j < n; j++) {
                double acc = 0.0;
                for (k = 0; k < n; k++)
                    acc += term[i][k] * m[k][j];
                tmp[i][j] = acc / q;
            }
        for (i = 0; i < n; i++)
            for (j = 0; j < n; j++) {
                term[i][j] = tmp[i][j];
                out[i][j] += tmp[i][j];
            }
    }
    for (; s > 0; s--) {
        for (i = 0; i < n; i++)
            for (j = 0; j < n; j++) {
                double acc = 0.0;
                for (k = 0; k < n; k++)
                    acc += out[i][k] * out[k][j];
                tmp[i][j] = acc;
            }
        memcpy(out, tmp, sizeof tmp);
    }
}

/* (Ad, Bd) over span seconds: exp([[A, B], [0, 0]] span). */
static void discretise(const plant *pl, double a[PLANT_MAX_STATES][PLANT_MAX_STATES],
                       const double bvec[PLANT_MAX_STATES], double span,
                       double ad[PLANT_MAX_STATES][PLANT_MAX_STATES], double bd[PLANT_MAX_STATES])
{
    double m[NA][NA], e[NA][NA];
    int n = pl->n, i, j;
    memset(m, 0, sizeof m);
    for (i = 0; i < n; i++) {
        for (j = 0; j < n; j++)
            m[i][j] = a[i][j] * span;
        m[i][n] = bvec[i] * span;
    }
    expm(n + 1, m, e);
    for (i = 0; i < n; i++) {
        for (j = 0; j < n; j++)
            ad[i][j] = e[i][j];
        bd[i] = e[i][n];
    }
}

int plant_init(plant *pl, const plant_params *p)
{
    double a[PLANT_MAX_STATES][PLANT_MAX_STATES], bvec[PLANT_MAX_STATES];
    double h = p->period;
    size_t m;
    int n = 0;
    memset(pl, 0, sizeof *pl);
    if (!(h > 0.0) || !(p->delay >= 0.0) || p->lag1 < 0.0 || p->lag2 < 0.0 || !(p->limit > 0.0) ||
        p->deadband < 0.0 || p->noise < 0.0 || p->resolution < 0.0 || !isfinite(p->gain))
        return -1;
    pl->p = *p;
    memset(a, 0, sizeof a);
    memset(bvec, 0, sizeof bvec);
    /* chain: gain * u -> lag1 -> lag2 -> integrator; the output is the last state */
    if (p->lag1 > 0.0) {
        a[n][n] = -1.0 / p->lag1;
        bvec[n] = p->gain / p->lag1;
        n++;
    }
    if (p->lag2 > 0.0) {
        a[n][n] = -1.0 / p->lag2;
        if (n > 0)
            a[n][n - 1] = 1.0 / p->lag2;
        else
            bvec[n] = p->gain / p->lag2;
        n++;
    }
    if (p->integrating) {
        if (n > 0)
            a[n][n - 1] = 1.0;
        else
            bvec[n] = p->gain;
        n++;
    }
    pl->n = n;
    if (n == 0) /* a static gain has no state: not a plant this simulator offers */
        return -1;
    m = (size_t)floor(p->delay / h + 1e-9);
    pl->f = p->delay - (double)m * h;
    if (pl->f < 1e-12 * h)
        pl->f = 0.0;
    pl->hist_len = m + 2u;
    pl->hist = calloc(pl->hist_len, sizeof *pl->hist);
    if (pl->hist == NULL)
        return -1;
    discretise(pl, a, bvec, pl->f, pl->ad_f, pl->bd_f);
    discretise(pl, a, bvec, h - pl->f, pl->ad_g, pl->bd_g);
    pl->rng = p->seed ? p->seed : 0x9E3779B97F4A7C15ull;
    return 0;
}

void plant_free(plant *pl)
{
    free(pl->hist);
    pl->hist = NULL;
}

/* effective plant input of an applied drive: dead zone, then the load */
static double effective(const plant *pl, double u)
{
    double d = pl->p.deadband;
    if (fabs(u) <= d)
        u = 0.0;
    else
        u -= (u > 0.0 ? d : -d);
    return u + pl->p.load;
}

/* the input (after the dead time) acting j ticks ago: hist[pos - j] */
static double past(const plant *pl, size_t j)
{
    return pl->hist[(pl->hist_pos + pl->hist_len - j) % pl->hist_len];
}

double plant_y(const plant *pl) { return pl->x[pl->n - 1]; }

static uint64_t next_random(plant *pl)
{
    /* xorshift64* */
    uint64_t x = pl->rng;
    x ^= x >> 12;
    x ^= x << 25;
    x ^= x >> 27;
    pl->rng = x;
    return x * 0x2545F4914F6CDD1Dull;
}

static double gaussian(plant *pl)
{
    double u1, u2, r;
    if (pl->have_spare) {
        pl->have_spare = 0;
        return pl->spare;
    }
    do {
        u1 = (double)(next_random(pl) >> 11) * (1.0 / 9007199254740992.0);
    } while (u1 <= 0.0);
    u2 = (double)(next_random(pl) >> 11) * (1.0 / 9007199254740992.0);
    r = sqrt(-2.0 * log(u1));
    pl->spare = r * sin(6.283185307179586 * u2);
    pl->have_spare = 1;
    return r * cos(6.283185307179586 * u2);
}

double plant_read(plant *pl)
{
    double v = plant_y(pl) + pl->p.offset;
    if (pl->p.noise > 0.0)
        v += pl->p.noise * gaussian(pl);
    if (pl->p.resolution > 0.0)
        v = nearbyint(v / pl->p.resolution) * pl->p.resolution;
    return v;
}

double plant_saturate(const plant *pl, double u)
{
    if (u > pl->p.limit)
        return pl->p.limit;
    if (u < -pl->p.limit)
        return -pl->p.limit;
    return u;
}

static void step(plant *pl, double ad[PLANT_MAX_STATES][PLANT_MAX_STATES],
                 const double bd[PLANT_MAX_STATES], double u)
{
    double x[PLANT_MAX_STATES];
    int i, j, n = pl->n;
    for (i = 0; i < n; i++) {
        double acc = bd[i] * u;
        for (j = 0; j < n; j++)
            acc += ad[i][j] * pl->x[j];
        x[i] = acc;
    }
    for (i = 0; i < n; i++)
        pl->x[i] = x[i];
}

void plant_advance(plant *pl, double u)
{
    /* the plant sees the input delayed by m ticks + f seconds: over [t_k, t_k + f) the
     * input of tick k - m - 1, over [t_k + f, t_k+1) the input of tick k - m */
    size_t m = pl->hist_len - 2u;
    pl->hist_pos = (pl->hist_pos + 1u) % pl->hist_len;
    pl->hist[pl->hist_pos] = effective(pl, plant_saturate(pl, u));
    if (pl->f > 0.0)
        step(pl, pl->ad_f, pl->bd_f, past(pl, m + 1u));
    step(pl, pl->ad_g, pl->bd_g, past(pl, m));
}
