/* test_formulas.c: the closed-form thickness formulas, the width at a level and the small numerical
 * tools of analysis/, against published check values and independent derivations. */
#include <criterion/criterion.h>
#include <math.h>

#include "an_int.h"

#define TAN_THETA 0.1 /* 10:1 ramps */

/* ACR large-phantom guidance: slice thickness = 0.2 x (top x bottom) / (top + bottom) for the two
 * signal ramps (worked example from phantom-large.md: a = b = 50 mm gives 5.0 mm). */
Test(formulas, acr_worked_example)
{
    cr_assert_float_eq(an_acr_thickness(50, 50, TAN_THETA), 5.0, 1e-12);
    /* the same formula written out for unequal lengths */
    cr_assert_float_eq(an_acr_thickness(40, 60, TAN_THETA), 0.2 * 40 * 60 / 100.0, 1e-12);
    cr_assert(isnan(an_acr_thickness(0, 50, TAN_THETA)));
}

/* phantom-large.md check values: a 2-degree tilt of a 5 mm slice gives a = 36.929 mm and
 * b = 77.098 mm; the ACR formula gives 4.994 mm, the tilt-corrected form 5.000 mm and a tilt of
 * 2.00 degrees; rounded to 36.9 and 77.1 the exact form gives 4.997 mm. */
Test(formulas, tilt_check_values)
{
    double tphi = tan(2 * atan(TAN_THETA));
    cr_assert(fabs(an_acr_thickness(36.929, 77.098, TAN_THETA) - 4.994) < 0.0005);
    cr_assert(fabs(an_corrected_thickness(36.929, 77.098, tphi) - 5.000) < 0.0005);
    cr_assert(fabs(an_tilt_deg(an_corrected_thickness(36.929, 77.098, tphi), 36.929, TAN_THETA) -
                   2.00) < 0.005);
    cr_assert(fabs(an_corrected_thickness(36.9, 77.1, tphi) - 4.997) < 0.0005);
}

/* NEMA MS 5's crossed ramps at 45 degrees (angles adding to 90 degrees): T = sqrt(a b). */
Test(formulas, reduces_to_sqrt_ab_at_90_degrees)
{
    double a = 4.2, b = 6.1;
    cr_assert_float_eq(an_corrected_thickness(a, b, INFINITY), sqrt(a * b), 1e-12);
    /* approaching 90 degrees the general form tends to the same value */
    cr_assert(fabs(an_corrected_thickness(a, b, tan(M_PI / 2 - 1e-7)) - sqrt(a * b)) < 1e-5);
}

/* Independent derivation by trigonometry: a slice of thickness T tilted by alpha sees ramps at
 * theta + alpha and theta - alpha, so a = T / tan(theta + alpha), b = T / tan(theta - alpha). The
 * corrected form must return T for every tilt; at zero tilt it must agree with the ACR form to
 * 0.01 mm. */
Test(formulas, corrected_recovers_thickness_and_tilt)
{
    double th = atan(TAN_THETA), tphi = tan(2 * th);
    for (double T = 2; T <= 10; T += 1.5)
        for (double al = -3; al <= 3; al += 0.5) {
            double r = al * M_PI / 180, a = T / tan(th + r), b = T / tan(th - r);
            double Tc = an_corrected_thickness(a, b, tphi);
            cr_assert(fabs(Tc - T) < 1e-9, "T %g tilt %g: %g", T, al, Tc);
            cr_assert(fabs(an_tilt_deg(Tc, a, TAN_THETA) - al) < 1e-7);
            if (al == 0)
                cr_assert(fabs(Tc - an_acr_thickness(a, b, TAN_THETA)) < 0.01);
        }
}

/* The width at a level on a triangle, where the crossings are known exactly (common practice:
 * linear interpolation between the samples that straddle the level). */
Test(formulas, width_at_level_triangle)
{
    float v[41];
    for (int i = 0; i < 41; i++)
        v[i] = (float)(100 - 5 * abs(i - 20)); /* zero at 0 and 40 */
    double lo, hi;
    cr_assert_eq(an_width_at_level(v, 41, 20, 50, &lo, &hi), 0);
    cr_assert_float_eq(lo, 10.0, 1e-9);
    cr_assert_float_eq(hi, 30.0, 1e-9);
    /* the level above the peak, or a profile that never falls below it, is refused */
    cr_assert_eq(an_width_at_level(v, 41, 20, 120, &lo, &hi), -1);
    cr_assert_eq(an_width_at_level(v, 41, 20, -1, &lo, &hi), -1);
}

/* Least-squares polynomials reproduce a polynomial exactly, and the weights g give the fitted
 * value as a linear combination of the samples (the basis of the noise propagation). */
Test(formulas, poly_fit_exact)
{
    double p[41], c[4], g[41];
    for (int i = 0; i < 41; i++) {
        double t = (i - 17.3) * 0.1;
        p[i] = 2.0 - 0.7 * t + 0.3 * t * t - 0.05 * t * t * t;
    }
    cr_assert_eq(an_poly_fit(p, 0, 40, 17.3, 0.1, 3, c, 0.42, g), 0);
    cr_assert_float_eq(c[0], 2.0, 1e-9);
    cr_assert_float_eq(c[1], -0.7, 1e-9);
    cr_assert_float_eq(c[2], 0.3, 1e-9);
    cr_assert_float_eq(c[3], -0.05, 1e-9);
    double q = 0, want = 2.0 - 0.7 * 0.42 + 0.3 * 0.42 * 0.42 - 0.05 * pow(0.42, 3);
    for (int i = 0; i < 41; i++)
        q += g[i] * p[i];
    cr_assert_float_eq(q, want, 1e-9);
}

/* A level crossing on a linear edge is found exactly wherever it lies between samples. */
Test(formulas, crossing_on_linear_edge)
{
    double p[200];
    for (int i = 0; i < 200; i++)
        p[i] = 3.0 * (i * 0.1 - 7.77); /* crosses 0 at 7.77 mm */
    an_xing x;
    cr_assert_eq(an_xing_find(NULL, p, 200, 70, 0.0, 10.0, +1, &x), 0); /* no line: h in samples */
    cr_assert_float_eq(x.idx, 77.7, 1e-6);
    /* the wrong slope sign finds nothing */
    cr_assert_neq(an_xing_find(NULL, p, 200, 70, 0.0, 10.0, -1, &x), 0);
}

/* Rayleigh distribution (no signal): mean sigma sqrt(pi / 2), median sigma sqrt(2 ln 2) (standard
 * results, e.g. Papoulis, Probability, Random Variables and Stochastic Processes); for large signal
 * the Rice mean tends to sqrt(a^2 + sigma^2) (Gudbjartsson and Patz 1995, MRM 34:910). scipy checks
 * the full curve in check_scipy.py. */
Test(formulas, rician_limits)
{
    cr_assert_float_eq(an_rice_mean(0, 2.0), 2.0 * sqrt(M_PI / 2), 1e-6);
    cr_assert_float_eq(an_rice_sd(0, 2.0), 2.0 * sqrt(2 - M_PI / 2), 1e-6);
    cr_assert(fabs(an_rice_mean(50, 1.0) - sqrt(2501.0)) < 1e-3);
    cr_assert_float_eq(an_rice_invert(an_rice_mean(3.0, 1.0), 1.0), 3.0, 1e-6);
    cr_assert_float_eq(an_rice_invert(1.0, 1.0), 0.0, 1e-12); /* below the Rayleigh mean */
}

/* Order statistics on a known set. */
Test(formulas, median)
{
    float v[7] = {5, 1, 9, 3, 7, 2, 8};
    cr_assert_float_eq(an_median(v, 7), 5.0, 1e-12);
    float w[4] = {4, 1, 3, 2};
    cr_assert_float_eq(an_median(w, 4), 2.5, 1e-12);
}
