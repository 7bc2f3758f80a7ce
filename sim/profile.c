/* profile.c: slice profiles: Bloch simulation of a Hamming-windowed sinc excitation (and
 * refocusing) pulse under the slice gradient, simple analytic shapes, relaxation and steady state,
 * widths. */
#include <complex.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "sim_int.h"

#define DEFAULT_STEPS 500  /* FWHM within 0.0002 mm of 4000 steps (tbw 4 and 8, 90 degrees) */
#define BLOCH_RANGE_BW 2.0 /* frequency offsets simulated: +-2 pulse bandwidths */
#define BLOCH_SAMPLES_PER_BW 200
#define SIMPLE_SAMPLES_PER_FWHM 200

static const double GAMMA_BAR_HZ_PER_T = SIM_GAMMA_BAR_MHZ_PER_T * 1e6;

/* ---- widths ---- */
int sim_width_at_level(const double *v, int n, double level, double *width, double *mid)
{
    int lo = -1, hi = -1;
    for (int i = 0; i < n; i++)
        if (v[i] >= level) {
            lo = i;
            break;
        }
    for (int i = n - 1; i >= 0; i--)
        if (v[i] >= level) {
            hi = i;
            break;
        }
    if (lo <= 0 || hi < 0 || hi >= n - 1)
        return -1;
    double xl = (lo - 1) + (level - v[lo - 1]) / (v[lo] - v[lo - 1]);
    double xh = hi + (v[hi] - level) / (v[hi] - v[hi + 1]);
    *width = xh - xl;
    if (mid)
        *mid = 0.5 * (xl + xh);
    return 0;
}

/* ---- allocation ---- */

/* A profile of n samples with zeroed arrays; NULL on allocation failure or bad n. The caller owns
 * it and frees it with sim_profile_free. */
static sim_profile *profile_alloc(int n)
{
    sim_profile *pr = NULL;
    size_t bytes = 0;
    if (n < 3 || sw_mul_size((size_t)n, 5 * sizeof(double), &bytes) != 0)
        return NULL;
    pr = calloc(1, sizeof *pr);
    if (!pr)
        return NULL;
    pr->re = calloc(1, bytes);
    if (!pr->re) {
        free(pr);
        return NULL;
    }
    pr->n = n;
    pr->im = pr->re + n;
    pr->mag = pr->re + 2 * (size_t)n;
    pr->cum_re = pr->re + 3 * (size_t)n;
    pr->cum_im = pr->re + 4 * (size_t)n;
    return pr;
}

void sim_profile_free(sim_profile *pr)
{
    if (!pr)
        return;
    free(pr->re);
    free(pr);
}

/* Magnitude, peak, widths and centre; the running integral too unless have_cum. */
static sw_status profile_finish(sim_profile *pr, int have_cum, sw_error *err)
{
    double peak = 0;
    for (int i = 0; i < pr->n; i++) {
        pr->mag[i] = hypot(pr->re[i], pr->im[i]);
        if (pr->mag[i] > peak)
            peak = pr->mag[i];
    }
    if (!have_cum) {
        pr->cum_re[0] = pr->cum_im[0] = 0;
        for (int i = 1; i < pr->n; i++) {
            pr->cum_re[i] = pr->cum_re[i - 1] + 0.5 * pr->dz_mm * (pr->re[i - 1] + pr->re[i]);
            pr->cum_im[i] = pr->cum_im[i - 1] + 0.5 * pr->dz_mm * (pr->im[i - 1] + pr->im[i]);
        }
    }
    pr->peak = peak;
    double w = 0, mid = 0, w10 = 0;
    if (!(peak > 0) || sim_width_at_level(pr->mag, pr->n, 0.5 * peak, &w, &mid) != 0 ||
        sim_width_at_level(pr->mag, pr->n, 0.1 * peak, &w10, NULL) != 0)
        return sw_error_set(err, SW_EINVAL,
                            "simulator: slice profile does not fall to a tenth of its peak inside "
                            "the simulated range");
    pr->fwhm_mm = w * pr->dz_mm;
    pr->fwtm_mm = w10 * pr->dz_mm;
    pr->centre_mm = pr->z0_mm + mid * pr->dz_mm;
    return SW_OK;
}

void sim_profile_integral(const sim_profile *pr, double z1, double z2, double *re, double *im)
{
    double r[2], m[2], z[2] = {z1, z2};
    int last = pr->n - 1;
    for (int k = 0; k < 2; k++) {
        double x = (z[k] - pr->z0_mm) / pr->dz_mm;
        if (!(x > 0)) {
            r[k] = m[k] = 0;
        } else if (x >= last) {
            r[k] = pr->cum_re[last];
            m[k] = pr->cum_im[last];
        } else {
            int i = (int)x;
            double f = x - i;
            r[k] = pr->cum_re[i] + f * (pr->cum_re[i + 1] - pr->cum_re[i]);
            m[k] = pr->cum_im[i] + f * (pr->cum_im[i + 1] - pr->cum_im[i]);
        }
    }
    *re = r[1] - r[0];
    *im = m[1] - m[0];
}

/* ---- Bloch simulation ----
 * The Bloch equation without relaxation, dM/dt = gamma M x B (Bloch 1946), in the rotating frame:
 * with Omega = (w1(t), 0, 2 pi f) rad/s (RF along x, f the offset gamma-bar G z), M turns about
 * Omega by -|Omega| dt in each step of constant field (Rodrigues' rotation formula). That is the
 * hard-pulse (piecewise-constant) approximation integrated with exact rotation matrices. */
void sim_bloch_run(const double *w1, int ns, double dt, double f_hz, double m[3])
{
    double mx = m[0], my = m[1], mz = m[2];
    double oz = 2.0 * M_PI * f_hz;
    for (int j = 0; j < ns; j++) {
        double ox = w1[j];
        double om = sqrt(ox * ox + oz * oz);
        if (om == 0)
            continue;
        double nx = ox / om, nz = oz / om;
        double phi = om * dt;
        double c = cos(phi), s = sin(phi);
        double nd = (nx * mx + nz * mz) * (1.0 - c);
        /* M' = M cos(phi) + (M x n) sin(phi) + n (n . M)(1 - cos(phi)) */
        double x2 = mx * c + my * nz * s + nx * nd;
        double y2 = my * c + (mz * nx - mx * nz) * s;
        double z2 = mz * c - my * nx * s + nz * nd;
        mx = x2;
        my = y2;
        mz = z2;
    }
    m[0] = mx;
    m[1] = my;
    m[2] = mz;
}

/* The RF amplitude (rad/s) of a Hamming-windowed sinc of time-bandwidth product tbw and duration
 * T at ns step mid-points, scaled so that its area is the flip angle (the small-tip relation,
 * exact for the on-resonance rotation angle of an RF along one axis). */
static void sinc_pulse(double tbw, double dur_s, double flip_rad, int ns, double *w1)
{
    double area = 0, dt = dur_s / ns;
    for (int j = 0; j < ns; j++) {
        double t = -0.5 * dur_s + (j + 0.5) * dt;
        double x = tbw * t / dur_s;
        double sinc = x == 0 ? 1.0 : sin(M_PI * x) / (M_PI * x);
        double ham = 0.54 + 0.46 * cos(2.0 * M_PI * t / dur_s);
        w1[j] = ham * sinc;
        area += w1[j] * dt;
    }
    for (int j = 0; j < ns; j++)
        w1[j] *= flip_rad / area;
}

/* What a Bloch run gives on the frequency grid f_i = (i - h) df, i < nf. */
typedef struct bloch_result {
    int nf;
    double df_hz;
    double complex *mxy; /* excitation from M0 = z, after ideal rephasing, phase set 0 at f = 0 */
    double *mz_exc;      /* Mz after the excitation (cos of the local flip angle) */
    double *mz_ref; /* Mz after the refocusing pulse from M0 = z (1 - 2 |beta|^2); NULL: none */
} bloch_result;

static void bloch_result_free(bloch_result *b)
{
    free(b->mxy);
    free(b->mz_exc);
    free(b->mz_ref);
}

/* Fills b with the Bloch simulation of p's pulses on the frequency grid. On success b's arrays are
 * the caller's to release with bloch_result_free; on failure they are released and NULL. */
static sw_status bloch_profile(const sim_profile_params *p, bloch_result *b, sw_error *err)
{
    sw_status st = SW_OK;
    double *w1 = NULL, *w180 = NULL;
    int ns = p->steps > 0 ? p->steps : DEFAULT_STEPS;
    double dur = p->duration_ms * 1e-3;
    double bw = p->tbw / dur;
    int half = (int)(BLOCH_RANGE_BW * BLOCH_SAMPLES_PER_BW);
    memset(b, 0, sizeof *b);
    b->nf = 2 * half + 1;
    b->df_hz = bw / BLOCH_SAMPLES_PER_BW;
    w1 = malloc((size_t)ns * sizeof *w1);
    b->mxy = malloc((size_t)b->nf * sizeof *b->mxy);
    b->mz_exc = malloc((size_t)b->nf * sizeof *b->mz_exc);
    if (p->spin_echo) {
        w180 = malloc((size_t)ns * sizeof *w180);
        b->mz_ref = malloc((size_t)b->nf * sizeof *b->mz_ref);
    }
    if (!w1 || !b->mxy || !b->mz_exc || (p->spin_echo && (!w180 || !b->mz_ref))) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the Bloch simulation");
        goto out;
    }
    sinc_pulse(p->tbw, dur, p->flip_deg * M_PI / 180.0, ns, w1);
    if (p->spin_echo) /* same duration, bandwidth scaled: time-bandwidth product tbw x ratio */
        sinc_pulse(p->tbw * (p->refocus_ratio > 0 ? p->refocus_ratio : 1.0), dur, M_PI, ns, w180);
    for (int i = 0; i < b->nf; i++) {
        double f = (i - half) * b->df_hz;
        double m[3] = {0, 0, 1};
        sim_bloch_run(w1, ns, dur / ns, f, m);
        /* Ideal rephasing lobe: free precession under -G for half the pulse (its area about the
         * symmetric pulse's centre): turns Mxy by +2 pi f T/2 (the opposite of the precession
         * e^{-i 2 pi f t} that the same code applies under +G). */
        double complex mxy = (m[0] + I * m[1]) * cexp(I * M_PI * f * dur);
        b->mxy[i] = mxy;
        b->mz_exc[i] = m[2];
        if (p->spin_echo) {
            double r[3] = {0, 0, 1};
            sim_bloch_run(w180, ns, dur / ns, f, r);
            b->mz_ref[i] = r[2];
        }
    }
    /* A global phase is not observable in a magnitude image: make the centre real and positive. */
    double complex c0 = b->mxy[half];
    if (cabs(c0) > 0) {
        double complex ph = conj(c0) / cabs(c0);
        for (int i = 0; i < b->nf; i++)
            b->mxy[i] *= ph;
    }
out:
    free(w1);
    free(w180);
    if (st != SW_OK)
        bloch_result_free(b);
    return st;
}

/* ---- relaxation ----
 * Longitudinal magnetisation just before each excitation in the steady state of a spin-echo train
 * (excitation at 0, refocusing pulses at TE1/2 and (TE1 + TE2)/2, next excitation at TR), with
 * transverse magnetisation spoiled by the end of TR and the refocusing pulses' conversion of
 * transverse into longitudinal magnetisation dephased by crushers. Between pulses Mz relaxes as
 * Mz(t) = Mz(0) e^{-t/T1} + 1 - e^{-t/T1} (Bloch 1946); a pulse multiplies Mz by cos of its local
 * angle. The resulting map Mz -> A Mz + B has the fixed point B / (1 - A). With cos = 0 and -1
 * (ideal 90 and 180 degree pulses) and one echo it is the textbook spin-echo factor
 * 1 - 2 e^{-(TR - TE/2)/T1} + e^{-TR/T1}. */
static double steady_mz(const sim_timing *t, double c_exc, double c_ref)
{
    double a = c_exc, bb = 0, now = 0;
    double tau[SIM_MAX_ECHOES];
    tau[0] = 0.5 * t->te_ms[0];
    if (t->n_echoes > 1)
        tau[1] = 0.5 * (t->te_ms[0] + t->te_ms[1]);
    for (int k = 0; k < t->n_echoes; k++) {
        double e = exp(-(tau[k] - now) / t->t1_ms);
        a *= e;
        bb = bb * e + (1.0 - e);
        a *= c_ref;
        bb *= c_ref;
        now = tau[k];
    }
    double e = exp(-(t->tr_ms - now) / t->t1_ms);
    a *= e;
    bb = bb * e + (1.0 - e);
    return bb / (1.0 - a);
}

static sw_status check_params(const sim_profile_params *p, const sim_timing *t, sw_error *err)
{
    if (!(p->thickness_mm > 0.05 && p->thickness_mm <= 100))
        return sw_error_set(err, SW_EINVAL,
                            "simulator: slice thickness %g mm out of range (0.05..100)",
                            p->thickness_mm);
    { /* the pulse also sets the gradient of the simple shapes (nominal relation) */
        if (!(p->tbw >= 1 && p->tbw <= 32))
            return sw_error_set(err, SW_EINVAL,
                                "simulator: time-bandwidth product %g out of range (1..32)",
                                p->tbw);
        if (!(p->duration_ms >= 0.1 && p->duration_ms <= 50))
            return sw_error_set(err, SW_EINVAL,
                                "simulator: pulse duration %g ms out of range (0.1..50)",
                                p->duration_ms);
    }
    if (p->kind == SIM_PROFILE_BLOCH_SINC) {
        if (!(p->flip_deg > 0 && p->flip_deg <= 180))
            return sw_error_set(err, SW_EINVAL, "simulator: flip angle %g out of range (0..180]",
                                p->flip_deg);
        if (p->spin_echo &&
            !(p->refocus_ratio == 0 || (p->refocus_ratio >= 0.5 && p->refocus_ratio <= 3)))
            return sw_error_set(err, SW_EINVAL,
                                "simulator: refocusing bandwidth ratio %g out of "
                                "range (0.5..3)",
                                p->refocus_ratio);
        if (p->steps < 0 || p->steps > 100000)
            return sw_error_set(err, SW_EINVAL, "simulator: Bloch steps %d out of range", p->steps);
    } else if (p->kind == SIM_PROFILE_RECT_GAUSS) {
        if (!(p->blur_mm > 0 && p->blur_mm < p->thickness_mm))
            return sw_error_set(err, SW_EINVAL,
                                "simulator: blur %g mm must be positive and below the thickness",
                                p->blur_mm);
    } else if (p->kind != SIM_PROFILE_RECT && p->kind != SIM_PROFILE_GAUSS) {
        return sw_error_set(err, SW_EINVAL, "simulator: unknown profile kind %d", (int)p->kind);
    }
    if (t) {
        if (t->n_echoes < 1 || t->n_echoes > SIM_MAX_ECHOES)
            return sw_error_set(err, SW_EINVAL, "simulator: %d echoes (1 or 2)", t->n_echoes);
        if (!(t->t1_ms > 0) || !(t->t2_ms > 0))
            return sw_error_set(err, SW_EINVAL, "simulator: relaxation times must be positive");
        double prev = 0;
        for (int e = 0; e < t->n_echoes; e++) {
            if (!(t->te_ms[e] > prev))
                return sw_error_set(err, SW_EINVAL, "simulator: echo times must rise from 0");
            prev = t->te_ms[e];
        }
        if (!(t->tr_ms > prev))
            return sw_error_set(err, SW_EINVAL, "simulator: TR %g ms must exceed the last TE",
                                t->tr_ms);
    }
    return SW_OK;
}

/* ---- simple shapes (peak 1, analytic running integral) ---- */
static double gauss_sigma(double fwhm)
{
    return fwhm / (2.0 * sqrt(2.0 * log(2.0)));
}

/* Rectangle of width w blurred by a unit-area Gaussian of SD s: value and running integral. */
static double rg_value(double z, double w, double s)
{
    double k = 1.0 / (s * sqrt(2.0));
    return 0.5 * (erf((z + 0.5 * w) * k) - erf((z - 0.5 * w) * k));
}

/* Integral of erf(x / (s sqrt 2)) from 0 to x. */
static double erf_int(double x, double s)
{
    return x * erf(x / (s * sqrt(2.0))) + s * sqrt(2.0 / M_PI) * (exp(-x * x / (2 * s * s)) - 1.0);
}

static double rg_cum(double z, double w, double s)
{
    return 0.5 * (erf_int(z + 0.5 * w, s) - erf_int(z - 0.5 * w, s));
}

static double rg_fwhm(double w, double s)
{
    double half = 0.5 * rg_value(0, w, s), lo = 0, hi = 0.5 * w + 10 * s;
    for (int it = 0; it < 200; it++) {
        double mid = 0.5 * (lo + hi);
        if (rg_value(mid, w, s) > half)
            lo = mid;
        else
            hi = mid;
    }
    return lo + hi;
}

/* The simple shape's profile (peak 1); the gradient from the nominal relation. */
static sw_status simple_profile(const sim_profile_params *p, sim_profile **out, sw_error *err)
{
    sw_status st = SW_OK;
    sim_profile *pr = NULL;
    double t = p->thickness_mm;
    double dz = t / SIMPLE_SAMPLES_PER_FWHM;
    double w = 0, s = 0, half_range = 0;
    switch (p->kind) {
    case SIM_PROFILE_RECT: half_range = 0.5 * t + 20 * dz; break;
    case SIM_PROFILE_GAUSS:
        s = gauss_sigma(t);
        half_range = 6.0 * s;
        break;
    default: /* RECT_GAUSS: the rectangle's width that gives the wanted FWHM, by bisection */
        s = gauss_sigma(p->blur_mm);
        {
            double lo = 0, hi = 2.0 * t;
            for (int it = 0; it < 200; it++) {
                double mid = 0.5 * (lo + hi);
                if (rg_fwhm(mid, s) < t)
                    lo = mid;
                else
                    hi = mid;
            }
            w = 0.5 * (lo + hi);
        }
        half_range = 0.5 * w + 6.0 * s;
        break;
    }
    int m = (int)ceil(half_range / dz);
    pr = profile_alloc(2 * m + 1);
    if (!pr) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the slice profile");
        goto out;
    }
    pr->dz_mm = dz;
    pr->z0_mm = -m * dz;
    double peak = p->kind == SIM_PROFILE_RECT_GAUSS ? rg_value(0, w, s) : 1.0;
    double c0 = 0;
    for (int i = 0; i < pr->n; i++) {
        double z = pr->z0_mm + i * dz, v = 0, c = 0;
        if (p->kind == SIM_PROFILE_RECT) {
            /* edges fall on samples (+-100 dz): the edge sample holds the mean of both sides so
             * that linear interpolation crosses the half level exactly at the edge */
            int k = abs(i - m);
            v = k < SIMPLE_SAMPLES_PER_FWHM / 2    ? 1.0
                : k == SIMPLE_SAMPLES_PER_FWHM / 2 ? 0.5
                                                   : 0.0;
            c = fmin(fmax(z, -0.5 * t), 0.5 * t);
        } else if (p->kind == SIM_PROFILE_GAUSS) {
            v = exp(-0.5 * z * z / (s * s));
            c = s * sqrt(M_PI / 2.0) * erf(z / (s * sqrt(2.0)));
        } else {
            v = rg_value(z, w, s) / peak;
            c = rg_cum(z, w, s) / peak;
        }
        if (i == 0)
            c0 = c;
        pr->re[i] = v;
        pr->im[i] = 0;
        pr->cum_re[i] = c - c0;
        pr->cum_im[i] = 0;
    }
    st = profile_finish(pr, 1, err);
    if (st != SW_OK)
        goto out;
    pr->bandwidth_hz = p->tbw / (p->duration_ms * 1e-3);
    pr->gradient_mt_per_m = pr->bandwidth_hz / (GAMMA_BAR_HZ_PER_T * t * 1e-3) * 1e3;
    pr->nominal_thickness_mm = t;
out:
    if (st != SW_OK) {
        sim_profile_free(pr);
        pr = NULL;
    }
    *out = pr;
    return st;
}

/* Scales a profile's samples and running integral by a real factor, or by a real function of the
 * sample (fac[i]) when fac is not NULL, then recomputes what depends on them. */
static sw_status profile_scale(sim_profile *pr, double k, const double *fac, sw_error *err)
{
    for (int i = 0; i < pr->n; i++) {
        double f = k * (fac ? fac[i] : 1.0);
        pr->re[i] *= f;
        pr->im[i] *= f;
    }
    if (!fac) {
        for (int i = 0; i < pr->n; i++) {
            pr->cum_re[i] *= k;
            pr->cum_im[i] *= k;
        }
    }
    return profile_finish(pr, fac == NULL, err);
}

static sim_profile *profile_copy(const sim_profile *src)
{
    sim_profile *pr = profile_alloc(src->n);
    if (!pr)
        return NULL;
    double *arrays = pr->re;
    *pr = *src;
    pr->re = arrays;
    pr->im = arrays + src->n;
    pr->mag = arrays + 2 * (size_t)src->n;
    pr->cum_re = arrays + 3 * (size_t)src->n;
    pr->cum_im = arrays + 4 * (size_t)src->n;
    memcpy(arrays, src->re, 5 * (size_t)src->n * sizeof(double));
    return pr;
}

/* Builds the base profile (out[0] when t is NULL) or the per-echo profiles of timing t. */
static sw_status build(const sim_profile_params *p, const sim_timing *t, sim_profile **out,
                       sw_error *err)
{
    sw_status st = SW_OK;
    bloch_result b = {0};
    sim_profile *base = NULL;
    double *fac = NULL;
    int ne = t ? t->n_echoes : 1;
    for (int e = 0; e < ne; e++)
        out[e] = NULL;
    st = check_params(p, t, err);
    if (st != SW_OK)
        goto out;

    if (p->kind != SIM_PROFILE_BLOCH_SINC) {
        st = simple_profile(p, &base, err);
        if (st != SW_OK)
            goto out;
        for (int e = 0; e < ne; e++) {
            out[e] = e == ne - 1 ? base : profile_copy(base);
            if (e == ne - 1)
                base = NULL;
            if (!out[e]) {
                st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the slice profile");
                goto out;
            }
            if (t) {
                double k = steady_mz(t, 0.0, -1.0) * exp(-t->te_ms[e] / t->t2_ms);
                st = profile_scale(out[e], k, NULL, err);
                if (st != SW_OK)
                    goto out;
            }
        }
        goto out;
    }

    st = bloch_profile(p, &b, err);
    if (st != SW_OK)
        goto out;
    /* The base profile on the frequency axis: excitation times one refocusing factor |beta|^2 =
     * (1 - Mz_ref) / 2 (the fraction of transverse magnetisation a refocusing pulse of local angle
     * theta refocuses, sin^2(theta / 2)). */
    base = profile_alloc(b.nf);
    fac = malloc((size_t)b.nf * sizeof *fac);
    if (!base || !fac) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the slice profile");
        goto out;
    }
    int half = b.nf / 2;
    for (int i = 0; i < b.nf; i++) {
        double beta2 = p->spin_echo ? 0.5 * (1.0 - b.mz_ref[i]) : 1.0;
        base->re[i] = creal(b.mxy[i]) * beta2;
        base->im[i] = cimag(b.mxy[i]) * beta2;
        fac[i] = hypot(base->re[i], base->im[i]);
    }
    /* The gradient: calibrated so the base profile's FWHM is the wanted thickness (as scanners
     * calibrate pulses), or nominal: thickness = bandwidth / (gamma-bar G). */
    double bw = p->tbw / (p->duration_ms * 1e-3);
    double pk = 0, w_samples = 0;
    for (int i = 0; i < b.nf; i++)
        pk = fmax(pk, fac[i]);
    if (sim_width_at_level(fac, b.nf, 0.5 * pk, &w_samples, NULL) != 0) {
        st = sw_error_set(err, SW_EINVAL, "simulator: Bloch profile has no half-maximum width");
        goto out;
    }
    double fwhm_hz = w_samples * b.df_hz;
    double g_t_per_m =
        (p->nominal_gradient ? bw : fwhm_hz) / (GAMMA_BAR_HZ_PER_T * p->thickness_mm * 1e-3);
    base->dz_mm = b.df_hz / (GAMMA_BAR_HZ_PER_T * g_t_per_m) * 1e3;
    base->z0_mm = -half * base->dz_mm;
    st = profile_finish(base, 0, err);
    if (st != SW_OK)
        goto out;
    base->gradient_mt_per_m = g_t_per_m * 1e3;
    base->bandwidth_hz = bw;
    base->nominal_thickness_mm = bw / (GAMMA_BAR_HZ_PER_T * g_t_per_m) * 1e3;

    if (!t) {
        out[0] = base;
        base = NULL;
        goto out;
    }
    for (int e = 0; e < ne; e++) {
        out[e] = profile_copy(base);
        if (!out[e]) {
            st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the slice profile");
            goto out;
        }
        double e2 = exp(-t->te_ms[e] / t->t2_ms);
        for (int i = 0; i < b.nf; i++) {
            double c_exc = p->steady_state ? b.mz_exc[i] : 0.0;
            double c_ref = p->steady_state && p->spin_echo ? b.mz_ref[i] : -1.0;
            double beta2 = p->spin_echo ? 0.5 * (1.0 - b.mz_ref[i]) : 1.0;
            /* base holds one refocusing factor; echo e has e + 1 of them */
            double more = 1.0;
            for (int k = 0; k < e; k++)
                more *= beta2;
            fac[i] = steady_mz(t, c_exc, c_ref) * more;
        }
        st = profile_scale(out[e], e2, fac, err);
        if (st != SW_OK)
            goto out;
    }
out:
    bloch_result_free(&b);
    sim_profile_free(base);
    free(fac);
    if (st != SW_OK)
        for (int e = 0; e < ne; e++) {
            sim_profile_free(out[e]);
            out[e] = NULL;
        }
    return st;
}

sw_status sim_profile_make(const sim_profile_params *p, sim_profile **out, sw_error *err)
{
    if (!p || !out)
        return sw_error_set(err, SW_EINVAL, "simulator: NULL argument");
    return build(p, NULL, out, err);
}

sw_status sim_profile_make_series(const sim_profile_params *p, const sim_timing *t,
                                  sim_profile *out[SIM_MAX_ECHOES], sw_error *err)
{
    if (!p || !t || !out)
        return sw_error_set(err, SW_EINVAL, "simulator: NULL argument");
    return build(p, t, out, err);
}
