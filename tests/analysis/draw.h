/* draw.h: a small analytic drawing of the large phantom for the analysis tests (independent of the
 * simulator): a rectangular slice profile integrated exactly per sub-sample, so that the truths are
 * known in closed form (strip FWHM length = T / tan(angle), bar length difference = -2 d). */
#ifndef DRAW_H
#define DRAW_H

#include <stdint.h>

#include "analysis.h"

typedef enum dr_insert { DR_CROSSED = 0, DR_NONE, DR_SINGLE_RAMP, DR_SINGLE_WEDGE } dr_insert;

typedef struct dr_params {
    int matrix; /* square, pixels */
    double fov_mm;
    double thickness_mm; /* rectangular slice profile */
    double d_mm;         /* every slice's displacement toward slice 11 */
    double cx_mm, cy_mm; /* phantom centre offset: image right, image up */
    double rot_deg;      /* counter-clockwise as displayed */
    double sigma;        /* per-channel noise (0: none) */
    double fluid;        /* fluid signal */
    dr_insert insert;
    double wedge_slope; /* DR_SINGLE_WEDGE: dw/du of the face */
    int wedges;         /* 1: bridge and bars on slices 1 and 11 */
    int uniform;        /* 1: every slice a plain disc (no insert, no wedges) */
    int noise_only;     /* 1: no phantom at all */
    uint64_t seed;
} dr_params;

void dr_defaults(dr_params *p);
/* Draws slice k (1-based, 11 slices 10 mm apart, head-first axial) into px (matrix^2 floats) and
 * fills the view (geometry included; px borrowed). */
void dr_slice(const dr_params *p, int k, float *px, an_image *view);
/* Gaussian deviate from a seeded xorshift generator (state in *s). */
double dr_gauss(uint64_t *s);

#endif
