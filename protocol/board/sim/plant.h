/*
 * plant.h - the simulated plant of board-sim (host code, double precision).
 *
 * K / ((T1 s + 1)(T2 s + 1)) [1/s] exp(-L s), with an actuator (saturation, dead zone), a
 * constant load at the plant input and a sensor (Gaussian noise, quantisation). The input is
 * held over each tick (zero-order hold) and every step is integrated exactly with the matrix
 * exponential of the augmented system, like mock_device/plant.py; the dead time splits a tick
 * where the delayed input changes.
 */
#ifndef BOARD_SIM_PLANT_H
#define BOARD_SIM_PLANT_H

#include <stddef.h>
#include <stdint.h>

#define PLANT_MAX_STATES 3

typedef struct plant_params {
    double gain;        /* K: PV units per output unit (per second when integrating) */
    double lag1, lag2;  /* time constants, s; 0 = absent */
    double delay;       /* dead time, s */
    int integrating;    /* 1: an integrator after the lags */
    double limit;       /* actuator saturation, output units */
    double deadband;    /* |u| <= deadband moves nothing, output units */
    double load;        /* constant disturbance at the plant input, output units */
    double noise;       /* sensor noise std, PV units */
    double resolution;  /* sensor quantisation step, PV units; 0 = none */
    double offset;      /* PV at rest, PV units */
    double period;      /* tick, s */
    uint64_t seed;      /* noise generator seed */
} plant_params;

typedef struct plant {
    plant_params p;
    int n;                                    /* states */
    double x[PLANT_MAX_STATES];
    double ad_f[PLANT_MAX_STATES][PLANT_MAX_STATES], bd_f[PLANT_MAX_STATES]; /* over f */
    double ad_g[PLANT_MAX_STATES][PLANT_MAX_STATES], bd_g[PLANT_MAX_STATES]; /* over h - f */
    double f;                                 /* fraction of a tick before the input changes */
    double *hist;                             /* inputs of the last m + 2 ticks (ring) */
    size_t hist_len, hist_pos;
    uint64_t rng;
    int have_spare;
    double spare;
} plant;

/* Set up `pl` (allocates the delay line); returns 0, or -1 on bad parameters. */
int plant_init(plant *pl, const plant_params *p);
void plant_free(plant *pl);
/* Noise-free plant output now, PV units. */
double plant_y(const plant *pl);
/* Sensor reading of the output now (noise, quantisation), PV units. */
double plant_read(plant *pl);
/* Actuator: the drive actually applied for command u (saturated), output units. */
double plant_saturate(const plant *pl, double u);
/* Hold command u (output units) for one tick. */
void plant_advance(plant *pl, double u);

#endif
