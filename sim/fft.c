/* fft.c: the acquisition's k-space truncation: FFT of the oversampled object grid, crop to the
 * matrix, inverse FFT. FFTW plans (single precision, FFTW_ESTIMATE) are cached per size; planning
 * is not thread-safe in FFTW, so it happens under a mutex, and execution uses the new-array
 * interface, which is. */
#include <fftw3.h>
#include <pthread.h>
#include <string.h>

#include "sim_int.h"

#define PLAN_CACHE 8

typedef struct plan_set {
    int nf, n;
    fftwf_plan rows; /* nf transforms of length nf along rows (forward) */
    fftwf_plan cols; /* n transforms of length nf down columns of an nf x n array (forward) */
    fftwf_plan inv;  /* n x n inverse */
} plan_set;

static pthread_mutex_t plan_lock = PTHREAD_MUTEX_INITIALIZER;
static plan_set plans[PLAN_CACHE];
static int n_plans;

float *sim_fft_alloc(size_t n_complex)
{
    size_t bytes = 0;
    if (sw_mul_size(n_complex, sizeof(fftwf_complex), &bytes) != 0)
        return NULL;
    return (float *)fftwf_malloc(bytes);
}

void sim_fft_free(float *p)
{
    if (p)
        fftwf_free(p);
}

/* The cached plans for (nf, n), made on first use; NULL when planning fails or the cache is
 * full. */
static const plan_set *get_plans(int nf, int n)
{
    const plan_set *found = NULL;
    fftwf_complex *a = NULL, *b = NULL;
    pthread_mutex_lock(&plan_lock);
    for (int i = 0; i < n_plans; i++)
        if (plans[i].nf == nf && plans[i].n == n) {
            found = &plans[i];
            goto out;
        }
    if (n_plans == PLAN_CACHE)
        goto out;
    a = fftwf_malloc(sizeof(fftwf_complex) * (size_t)nf * (size_t)nf);
    b = fftwf_malloc(sizeof(fftwf_complex) * (size_t)n * (size_t)n);
    if (!a || !b)
        goto out;
    plan_set *ps = &plans[n_plans];
    int len[1] = {nf};
    ps->rows = fftwf_plan_many_dft(1, len, nf, a, NULL, 1, nf, a, NULL, 1, nf, FFTW_FORWARD,
                                   FFTW_ESTIMATE);
    ps->cols =
        fftwf_plan_many_dft(1, len, n, a, NULL, n, 1, a, NULL, n, 1, FFTW_FORWARD, FFTW_ESTIMATE);
    ps->inv = fftwf_plan_dft_2d(n, n, b, b, FFTW_BACKWARD, FFTW_ESTIMATE);
    if (!ps->rows || !ps->cols || !ps->inv) {
        if (ps->rows)
            fftwf_destroy_plan(ps->rows);
        if (ps->cols)
            fftwf_destroy_plan(ps->cols);
        if (ps->inv)
            fftwf_destroy_plan(ps->inv);
        goto out;
    }
    ps->nf = nf;
    ps->n = n;
    found = ps;
    n_plans++;
out:
    if (a)
        fftwf_free(a);
    if (b)
        fftwf_free(b);
    pthread_mutex_unlock(&plan_lock);
    return found;
}

void sim_cleanup(void)
{
    pthread_mutex_lock(&plan_lock);
    for (int i = 0; i < n_plans; i++) {
        fftwf_destroy_plan(plans[i].rows);
        fftwf_destroy_plan(plans[i].cols);
        fftwf_destroy_plan(plans[i].inv);
    }
    n_plans = 0;
    fftwf_cleanup();
    pthread_mutex_unlock(&plan_lock);
}

/* DFT index of frequency k (-n/2 <= k < n/2) in an array of length len. */
static inline int kidx(int k, int len)
{
    return k < 0 ? k + len : k;
}

/* With fine samples f[j] at x0 + j d and coarse g[i] at x0 + i (os d), keeping the n frequencies
 * -n/2..n/2-1 of F = DFT_nf(f) gives g[i] = (1/nf) sum_k F[k] e^{2 pi i k i / n}: an inverse
 * n-point DFT of the cropped spectrum, scaled by 1/nf per dimension. */
sw_status sim_fft_crop(float *in, int nf, int n, float *out, sw_error *err)
{
    sw_status st = SW_OK;
    fftwf_complex *mid = NULL;
    const plan_set *ps = get_plans(nf, n);
    if (!ps) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: cannot make FFT plans for %d -> %d", nf, n);
        goto out;
    }
    fftwf_complex *a = (fftwf_complex *)in;
    fftwf_complex *o = (fftwf_complex *)out;
    mid = fftwf_malloc(sizeof(fftwf_complex) * (size_t)nf * (size_t)n);
    if (!mid) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the FFT");
        goto out;
    }
    fftwf_execute_dft(ps->rows, a, a);
    /* keep n column frequencies of each row: mid is nf rows x n columns */
    for (int i = 0; i < nf; i++)
        for (int k = -n / 2; k < n / 2; k++)
            memcpy(mid[(size_t)i * n + kidx(k, n)], a[(size_t)i * nf + kidx(k, nf)],
                   sizeof(fftwf_complex));
    fftwf_execute_dft(ps->cols, mid, mid);
    float scale = 1.0f / ((float)nf * (float)nf);
    for (int k = -n / 2; k < n / 2; k++) {
        const fftwf_complex *src = &mid[(size_t)kidx(k, nf) * n];
        fftwf_complex *dst = &o[(size_t)kidx(k, n) * n];
        for (int j = 0; j < n; j++) {
            dst[j][0] = src[j][0] * scale;
            dst[j][1] = src[j][1] * scale;
        }
    }
    fftwf_execute_dft(ps->inv, o, o);
out:
    if (mid)
        fftwf_free(mid);
    return st;
}
