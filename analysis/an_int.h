/* an_int.h: internals shared by the files of analysis/ (geometry, sampling, fits, noise); not part
 * of the public contract in analysis.h. */
#ifndef AN_INT_H
#define AN_INT_H

#include <math.h>
#include <stddef.h>

#include "analysis.h"

#define AN_DEG (180.0 / M_PI)

/* ---- geometry of one image ----
 * Stored pixel (x = column, y = row, centres at integers) to the display plane (a to the right, b
 * up, mm, origin at pixel 0,0): a = d[0] x + d[1] y, b = d[2] x + d[3] y. The display axes are unit
 * vectors of the patient frame: vhat is anterior (-y of LPS) projected into the slice plane (or a
 * fallback for planes that hold the y axis), uhat = w x vhat with w the slice normal oriented
 * toward slice 11 (wsign * n). That cross product is the left-handed phantom frame's u: for a
 * head-first image, uhat = +x (patient left shown on the right), as phantom-large.md defines. */
typedef struct an_geom {
    double d[4], di[4];
    double n[3]; /* unit normal r x c of the stored image (patient frame) */
    double z_n;  /* ImagePositionPatient . n */
    double uhat[3], vhat[3];
    int wsign; /* +1: slice 11 lies along +n; -1: along -n */
    int has_geometry;
} an_geom;

/* Fills g for image im with the given orientation of w (+1 or -1). Without geometry, the stored
 * image is taken as displayed (columns to the right, rows downwards) and z_n is NAN. Returns 0, or
 * -1 when the orientation is degenerate. */
int an_geom_make(const an_image *im, int wsign, an_geom *g);

/* Pose of the phantom in one image: phantom (u, v) mm to stored pixel (x, y):
 * x = m[0] + m[1] u + m[2] v, y = m[3] + m[4] u + m[5] v, and the inverse in inv[]. */
typedef struct an_pose {
    double m[6], inv[6];
} an_pose;

/* Pose for a phantom centred at stored pixel (xc, yc), turned by rot_deg counter-clockwise. */
void an_pose_make(const an_geom *g, double xc, double yc, double rot_deg, an_pose *p);
void an_pose_to_px(const an_pose *p, double u, double v, double *x, double *y);
void an_pose_to_ph(const an_pose *p, double x, double y, double *u, double *v);

/* A sampling lattice along an image axis of n pixels that a reversal of the axis maps onto itself:
 * points t_j = (n - 1) / 2 + j s for j = -k..k, k = an_lattice_k(n, s) the largest with t_-k >= 0.
 * A point is read as the mean of pixels floor(t_j) and ceil(t_j) (one pixel when t_j is whole), so
 * an image stored with its rows or columns reversed, or transposed, reads the same values at the
 * mirrored points: what is computed from them does not depend on the storage order. */
#define AN_LATTICE_MAX 4096 /* points of a lattice along one axis that a function keeps at once */
static inline int an_lattice_k(int n, double s)
{
    return n > 0 && s > 0 ? (int)floor(0.5 * (n - 1) / s) : 0;
}
static inline double an_lattice_t(int n, double s, int j)
{
    return 0.5 * (n - 1) + j * s;
}

/* Bilinear value at stored pixel (x, y); NAN outside the image. Inline: the profiles take most of
 * their time here. */
static inline double an_bilinear(const an_image *im, double x, double y)
{
    if (!(x >= 0 && y >= 0 && x <= im->width - 1 && y <= im->height - 1))
        return NAN;
    int x0 = (int)x, y0 = (int)y;
    if (x0 >= im->width - 1)
        x0 = im->width - 2;
    if (y0 >= im->height - 1)
        y0 = im->height - 2;
    if (x0 < 0 || y0 < 0) /* a one-pixel-wide image */
        return im->px[(ptrdiff_t)(y0 < 0 ? 0 : y0) * im->stride + (x0 < 0 ? 0 : x0)];
    double fx = x - x0, fy = y - y0;
    const float *r0 = im->px + (ptrdiff_t)y0 * im->stride + x0, *r1 = r0 + im->stride;
    return (1 - fy) * ((1 - fx) * r0[0] + fx * r0[1]) + fy * ((1 - fx) * r1[0] + fx * r1[1]);
}

/* ---- line sampling with exact noise bookkeeping ----
 * A profile along a line in the phantom frame, each sample the mean of k bilinear samples taken at
 * offsets across the line. Because each sample is a fixed linear combination of pixels, the
 * variance of any linear functional of the profile is sigma^2 times the sum of the squared pixel
 * weights. */
#define AN_LINE_MAX_OFF 33
typedef struct an_line {
    const an_image *img;
    an_pose pose;
    double u0, v0; /* phantom point of sample 0 at offset 0 (mm) */
    double du, dv; /* unit direction along the line */
    double pu, pv; /* unit direction across */
    double step;   /* mm between samples */
    int n;
    int k;
    double off[AN_LINE_MAX_OFF];
    const double *gain; /* per-sample factor applied to the profile after sampling, or NULL */
} an_line;

/* Sets k offsets spaced at most `spacing` mm apart over [-half, +half] (one offset when half is 0).
 */
/* A line from (u0, v0) in direction (du, dv), n samples step mm apart, on image im under pose p;
 * the across direction is (-dv, du); no averaging offsets until an_line_offsets. */
void an_line_init(an_line *l, const an_image *im, const an_pose *p, double u0, double v0, double du,
                  double dv, double step, int n);
void an_line_offsets(an_line *l, double half, double spacing);
/* Samples the profile into out[0..n); returns the number of samples that fell (partly) outside the
 * image (those are NAN). */
int an_line_sample(const an_line *l, double *out);
/* Sum over pixels of (sum_i c[i] w_i(pixel))^2 for samples i0 .. i0 + m - 1, where w_i are sample
 * i's pixel weights. NAN when a sample falls outside or memory runs out. */
double an_line_weight_ss(const an_line *l, int i0, int m, const double *c);
/* Phantom point of (fractional) sample index t at offset 0. */
void an_line_point(const an_line *l, double t, double *u, double *v);

/* ---- local polynomial fits on sampled profiles ---- */
/* Least-squares quadratic q(t) = c0 + c1 t + c2 t^2 over samples i0..i1 of p, with t = (i - ic) *
 * step. Returns 0, or -1 when fewer than 3 finite samples or the system is singular. When g is not
 * NULL, it receives the weights (i1 - i0 + 1 of them) of q(tq) = sum g[i - i0] p[i]. */
int an_quad_fit(const double *p, int i0, int i1, double ic, double step, double c[3], double tq,
                double *g);

/* Least-squares polynomial of degree deg (1..3) in t = (i - ic) * step over samples i0..i1; c[0..3]
 * (unused degrees zero); g as for an_quad_fit. */
int an_poly_fit(const double *p, int i0, int i1, double ic, double step, int deg, double *c,
                double tq, double *g);

/* A level crossing found by a local polynomial fit around a first guess. */
typedef struct an_xing {
    int ok;
    double idx;   /* fractional sample index of the crossing */
    double slope; /* dq/dt at the crossing, profile units per mm */
    double curv;  /* d2q/dt2 at the crossing, per mm^2 */
    double ss;    /* noise gain: var(q(x*)) = sigma^2 ss */
    int i0, i1;   /* fit window */
} an_xing;

/* Refines the crossing of `level` near sample index guess with a quadratic fitted over +-h_mm; the
 * slope's sign must be `sign` (+1 rising with index, -1 falling). l may be NULL (no noise gain). */
int an_xing_find(const an_line *l, const double *p, int n, double guess, double level, double h_mm,
                 int sign, an_xing *x);
/* Same, with the fit window kept within samples lim0..lim1. */
int an_xing_find_in(const an_line *l, const double *p, int lim0, int lim1, double guess,
                    double level, double h_mm, int sign, an_xing *x);

/* First crossing of level walking from index start in direction dir (+1/-1) on p, linear
 * interpolation; returns the fractional index or NAN. `below` = 1 looks for the first sample below
 * the level, 0 for the first sample at or above it. */
double an_walk_cross(const double *p, int n, int start, int dir, double level, int below);

/* Box smoothing of p into q (width w samples, odd; NAN samples skipped). */
void an_smooth(const double *p, int n, int w, double *q);
/* Mean of the finite samples of p[i0..i1] (clamped to [0, n)); NAN when none. */
double an_mean_range(const double *p, int n, int i0, int i1);

/* ---- statistics ---- */
/* k-th smallest of v[0..n) (reorders v). */
float an_select(float *v, size_t n, size_t k);
double an_median(float *v, size_t n);

/* Rician magnitude of a signal a with per-channel noise sigma: mean and SD. */
double an_rice_mean(double a, double sigma);
double an_rice_sd(double a, double sigma);
/* Signal a whose Rician mean is m (0 when m is at or below the Rayleigh mean). */
double an_rice_invert(double m, double sigma);

/* ---- phantom on one image ---- */
typedef struct an_disc {
    int found;
    double xc, yc; /* stored pixels */
    double r_mm;
    double rms_mm; /* RMS residual of the edge points to the circle */
    double thresh; /* Otsu threshold */
    double fluid;  /* median signal inside 0.6 r */
    int n_edge;
    char reason[AN_REASON_MAX];
} an_disc;

/* Work buffers for the (block-averaged) mask, reused across images. Start zeroed; the holder owns
 * them and releases them with an_work_free. an_work_reserve grows them to hold npx entries (the
 * stack 2 npx ints: the flood keeps coordinate pairs); on failure (-1) the old buffers stay valid
 * and owned. */
typedef struct an_work {
    size_t cap;
    unsigned char *mask;
    int *stack;
    float *coarse;
} an_work;

int an_work_reserve(an_work *w, size_t npx);
void an_work_free(an_work *w);

/* Finds the fluid disc (Otsu threshold on block means, largest component, holes filled) and, with
 * refine, fits a circle to sub-pixel edge points along rays (otherwise centre and radius come from
 * the filled mask's centroid and area). Fills d->reason when not found. Returns 0, or -1 on
 * allocation failure. */
int an_find_disc(const an_image *im, const an_model *model, int refine, an_work *w, an_disc *d);

/* Per-channel noise sigma from the air around a disc: the Rayleigh median in four bands around the
 * phantom, the mean of the two lowest bands (robust to ghosts along one direction). NAN when the
 * air is too small or masked to zero. scratch holds w * h floats. */
double an_noise_air(const an_image *im, const an_disc *d, float *scratch);
/* Fallback: sigma from neighbour differences inside a uniform central region (Gaussian regime). */
double an_noise_fluid(const an_image *im, const an_disc *d, float *scratch);
/* The variance factor of correlated noise for smooth weighted sums (phantom.c); NAN when the fluid
 * has too few clean tiles. */
double an_noise_corr(const an_image *im, const an_disc *d);
/* Mean fluid signal in a central disc of radius frac * r (pixels under half the median excluded).
 */
double an_fluid_mean(const an_image *im, const an_disc *d, double frac, float *scratch);

/* ---- the thickness insert on the ramp slice ---- */
typedef struct an_insert {
    int found;
    double rot_deg; /* in-plane rotation from the insert's long edges */
    double rot_unc_deg;
    double v_top, v_bot; /* long edges at u = 0 (phantom v, mm) */
    double u_lo, u_hi;   /* ends along u */
    int n_strips;
    double strip_v[2], strip_w[2]; /* centre and width across: [0] top (or the only), [1] bottom */
    char reason[AN_REASON_MAX];
} an_insert;

/* Orientation of the dark pixels near the centre: the major axis angle in the display plane
 * (degrees, -90..90), elongation sqrt(l1 / l2), area (mm^2) and centroid distance from the disc
 * centre (mm). Returns -1 when there are too few dark pixels, -2 when memory ran out. */
int an_dark_axis(const an_image *im, const an_geom *g, const an_disc *d, double *angle_deg,
                 double *elong, double *area_mm2, double *off_mm);
/* Refines the rotation from the insert's long edges, starting at rot0, and finds its ends and the
 * strips. ins->found says whether it worked, ins->reason why not. Returns -1 on allocation failure.
 */
int an_insert_find(const an_image *im, const an_geom *g, const an_disc *d, const an_model *m,
                   double rot0, int want_strips, an_insert *ins);
/* Measures strip s (0 top, 1 bottom) of the insert on its profile along u. sigma is the per-channel
 * noise (NAN: no uncertainty). Fills out (reason when not measured). Returns -1 on allocation
 * failure. */
int an_strip_measure(const an_image *im, const an_pose *pose, const an_insert *ins, int s,
                     double sigma, const an_params *par, an_strip *out);
/* NEMA single-wedge method: the edge response along u in the band of strip s differentiated; the
 * FWHM of that profile is stored in out->length_mm. */
int an_wedge_edge_measure(const an_image *im, const an_pose *pose, const an_insert *ins,
                          double sigma, const an_params *par, an_strip *out);

/* ---- wedge bars ---- */
/* Measures both bars on a wedge slice with the given pose; fills the bars, the difference and the
 * displacement of out (its reason when not measured). nominal_mm sets the search windows.
 * Returns -1 on allocation failure. */
int an_bars_measure(const an_image *im, const an_pose *pose, const an_model *m, double sigma,
                    double nominal_mm, an_position *out, double *v_end_mm);

/* The bridge's lower edge beside the bars, at the given pose: its slope as a rotation (degrees,
 * counter-clockwise as displayed) to add to the pose's; NAN when the edge is not found. Returns -1
 * on allocation failure. */
int an_bridge_turn(const an_image *im, const an_pose *pose, const an_model *m, double *drot_deg);

#endif
