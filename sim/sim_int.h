/* sim_int.h: internals of the simulator shared by its source files (not a public interface). */
#ifndef SIM_INT_H
#define SIM_INT_H

#include <stdint.h>

#include "sim.h"

/* ---- PRNG: xoshiro256** seeded through splitmix64; one state per stream, no globals ---- */
typedef struct sim_rng {
    uint64_t s[4];
} sim_rng;

void sim_rng_seed(sim_rng *r, uint64_t seed);
uint64_t sim_rng_next(sim_rng *r);
double sim_rng_uniform(sim_rng *r);                     /* in (0, 1] */
void sim_rng_normal2(sim_rng *r, double *a, double *b); /* two independent N(0, 1) (Box-Muller) */
/* An independent stream for a (purpose, index) pair of one seed. */
void sim_rng_stream(sim_rng *r, uint64_t seed, uint64_t purpose, uint64_t index);

/* ---- Bloch: rotates m through ns steps of dt seconds of RF w1[j] (rad/s, along x) at offset f_hz,
 * dM/dt = M x Omega with Omega = (w1, 0, 2 pi f) (no relaxation; exact rotation per step) ---- */
void sim_bloch_run(const double *w1, int ns, double dt, double f_hz, double m[3]);

/* ---- scene: the phantom as signed primitives in the scanner plan frame ---- */
#define SIM_MAX_HALFSPACES 8
#define SIM_MAX_PRIMS 16

typedef struct sim_halfspace {
    double n[3]; /* scanner-frame normal: the primitive holds points p with n . p <= b */
    double b;
} sim_halfspace;

typedef struct sim_prim {
    int cylinder; /* 1: the fluid cylinder (radius, axis through t along axis[]) */
    double sign;  /* +1 fluid added, -1 plastic removed */
    int nh;
    sim_halfspace h[SIM_MAX_HALFSPACES];
    double radius;
    double eu[3], ev[3]; /* cylinder: phantom u and v directions in the scanner frame */
    double lo[3], hi[3]; /* scanner-frame bounding box */
} sim_prim;

typedef struct sim_scene {
    int n;
    sim_prim p[SIM_MAX_PRIMS]; /* p[0] is the cylinder */
    double M[3][3];            /* scanner = t + M phantom */
    double t[3];
} sim_scene;

/* Builds the scene of model m with pose (t gets the extra in-plane shift shift_x along x). */
sw_status sim_scene_build(const an_model *m, const sim_pose *pose, double shift_x, sim_scene *sc,
                          sw_error *err);
/* Phantom coordinates of scanner point p, and back. */
void sim_scene_to_phantom(const sim_scene *sc, const double p[3], double q[3]);
void sim_scene_to_scanner(const sim_scene *sc, const double q[3], double p[3]);

/* The object grid: nf x nf samples, column j at x0 + j step, row i at y0 - i step (row 0 on
 * top). */
typedef struct sim_grid {
    int nf;
    double x0, y0, step;
} sim_grid;

/* Adds, for each of the ne profiles, the profile-weighted integral of the object along z for the
 * slice centred at zc to acc[e] (nf x nf interleaved complex floats, row-major). */
void sim_scene_integrate(const sim_scene *sc, double zc, sim_profile *const *pr, int ne,
                         const sim_grid *g, float *const *acc);

/* ---- FFT: k-space crop of an oversampled grid (plans cached, guarded) ---- */
/* Turns the nf x nf grid in (os = nf / n times oversampled; destroyed) into the n x n image out
 * whose pixel (i, j) sits on fine sample (os i, os j): forward FFT, keep frequencies -n/2..n/2-1,
 * inverse FFT, scale. Returns SW_ENOMEM when a plan or buffer cannot be made. */
sw_status sim_fft_crop(float *in, int nf, int n, float *out, sw_error *err);
float *sim_fft_alloc(size_t n_complex);
void sim_fft_free(float *p);

#endif
