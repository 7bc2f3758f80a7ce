/* phantom.c: the fluid disc on one image (Otsu threshold, largest component, holes filled, circle
 * fitted to sub-pixel edge points), and the noise and signal levels around and inside it. */
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "an_int.h"

int an_work_reserve(an_work *w, size_t npx)
{
    if (npx <= w->cap)
        return 0;
    size_t bytes;
    if (sw_mul_size(npx, 2 * sizeof(int), &bytes)) /* the flood's stack holds (x, y) pairs */
        return -1;
    unsigned char *m = realloc(w->mask, npx);
    if (!m)
        return -1;
    w->mask = m;
    int *s = realloc(w->stack, bytes);
    if (!s)
        return -1;
    w->stack = s;
    float *c = realloc(w->coarse, npx * sizeof *c);
    if (!c)
        return -1;
    w->coarse = c;
    w->cap = npx;
    return 0;
}

void an_work_free(an_work *w)
{
    if (!w)
        return;
    free(w->mask);
    free(w->stack);
    free(w->coarse);
    memset(w, 0, sizeof *w);
}

/* Otsu's threshold over a 256-bin histogram of v[0..n) between lo and hi. */
static double otsu(const float *v, size_t n, double lo, double hi)
{
    double hist[256] = {0}, scale = 255.999 / (hi - lo);
    size_t total = 0;
    for (size_t i = 0; i < n; i++)
        if (isfinite(v[i])) {
            int b = (int)((v[i] - lo) * scale);
            hist[b < 0 ? 0 : b > 255 ? 255 : b] += 1;
            total++;
        }
    double sum = 0;
    for (int i = 0; i < 256; i++)
        sum += i * hist[i];
    double w0 = 0, s0 = 0, best = -1;
    int bi = 127;
    for (int i = 0; i < 255; i++) {
        w0 += hist[i];
        s0 += i * hist[i];
        double w1 = (double)total - w0;
        if (w0 <= 0 || w1 <= 0)
            continue;
        double m0 = s0 / w0, m1 = (sum - s0) / w1;
        double between = w0 * w1 * (m0 - m1) * (m0 - m1);
        if (between > best) {
            best = between;
            bi = i;
        }
    }
    return lo + (bi + 1) / scale;
}

/* 4-connected flood from seed over pixels whose mask equals `from`, setting them to `to`; the stack
 * (2 w h ints) holds coordinate pairs. Returns the number of pixels set. */
static size_t flood(unsigned char *m, int *stack, int w, int h, int seed, unsigned char from,
                    unsigned char to)
{
    size_t top = 0, count = 0;
    if (m[seed] != from)
        return 0;
    m[seed] = to;
    stack[top++] = seed % w;
    stack[top++] = seed / w;
    while (top) {
        int y = stack[--top], x = stack[--top];
        unsigned char *q = m + (size_t)y * w + x;
        count++;
        if (x > 0 && q[-1] == from) {
            q[-1] = to;
            stack[top++] = x - 1;
            stack[top++] = y;
        }
        if (x < w - 1 && q[1] == from) {
            q[1] = to;
            stack[top++] = x + 1;
            stack[top++] = y;
        }
        if (y > 0 && q[-w] == from) {
            q[-w] = to;
            stack[top++] = x;
            stack[top++] = y - 1;
        }
        if (y < h - 1 && q[w] == from) {
            q[w] = to;
            stack[top++] = x;
            stack[top++] = y + 1;
        }
    }
    return count;
}

/* Algebraic circle fit (Kasa) of points in mm; returns 0 and centre and radius. */
static int kasa(const double *X, const double *Y, const unsigned char *use, int n, double *xc,
                double *yc, double *r)
{
    double sx = 0, sy = 0, sxx = 0, syy = 0, sxy = 0, sz = 0, sxz = 0, syz = 0;
    int c = 0;
    for (int i = 0; i < n; i++) {
        if (!use[i])
            continue;
        double x = X[i], y = Y[i], z = x * x + y * y;
        sx += x;
        sy += y;
        sxx += x * x;
        syy += y * y;
        sxy += x * y;
        sz += z;
        sxz += x * z;
        syz += y * z;
        c++;
    }
    if (c < 5)
        return -1;
    /* Solve [sxx sxy sx; sxy syy sy; sx sy c] [D E F]' = -[sxz syz sz]'. */
    double A[3][4] = {{sxx, sxy, sx, -sxz}, {sxy, syy, sy, -syz}, {sx, sy, (double)c, -sz}};
    for (int k = 0; k < 3; k++) {
        int piv = k;
        for (int i = k + 1; i < 3; i++)
            if (fabs(A[i][k]) > fabs(A[piv][k]))
                piv = i;
        if (fabs(A[piv][k]) < 1e-12)
            return -1;
        for (int j = 0; j < 4; j++) {
            double t = A[k][j];
            A[k][j] = A[piv][j];
            A[piv][j] = t;
        }
        for (int i = 0; i < 3; i++) {
            if (i == k)
                continue;
            double f = A[i][k] / A[k][k];
            for (int j = k; j < 4; j++)
                A[i][j] -= f * A[k][j];
        }
    }
    double D = A[0][3] / A[0][0], E = A[1][3] / A[1][1], F = A[2][3] / A[2][2];
    *xc = -D / 2;
    *yc = -E / 2;
    double rr = *xc * *xc + *yc * *yc - F;
    if (!(rr > 0))
        return -1;
    *r = sqrt(rr);
    return 0;
}

#define NRAY 48

int an_find_disc(const an_image *im, const an_model *model, int refine, an_work *wk, an_disc *d)
{
    memset(d, 0, sizeof *d);
    d->xc = d->yc = d->r_mm = NAN;
    size_t npx;
    if (im->width < 8 || im->height < 8 ||
        sw_mul_size((size_t)im->width, (size_t)im->height, &npx) || npx > (size_t)INT32_MAX) {
        sw_strlcpy(d->reason, "phantom not found: image too small or too large", sizeof d->reason);
        return 0;
    }
    /* The mask works on block means (about 48 blocks across): cheap, and less noisy than pixels;
     * the rays below refine the edge at full resolution. The blocks sit on a lattice centred on
     * the image (an_lattice_t), so a flipped or transposed copy of the image gives the mirrored
     * mask and the same centre. */
    int w = im->width, h = im->height;
    int f = (w < h ? w : h) / 48;
    if (f < 1)
        f = 1;
    int kx = an_lattice_k(w, f), ky = an_lattice_k(h, f);
    int cw = 2 * kx + 1, ch = 2 * ky + 1;
    size_t cn = (size_t)cw * ch;
    if (an_work_reserve(wk, cn))
        return -1;
    double col = im->col_mm > 0 ? im->col_mm : 1, row = im->row_mm > 0 ? im->row_mm : 1;
    float *cv = wk->coarse;
    double lo = INFINITY, hi = -INFINITY;
    /* Each block is represented by the mean of the (up to) 2 x 2 pixels around its centre: a
     * quarter of the pixels or fewer are read, which is plenty to tell fluid from air. */
    int bx0[AN_LATTICE_MAX], bx1[AN_LATTICE_MAX];
    if (cw > AN_LATTICE_MAX || ch > AN_LATTICE_MAX) {
        sw_strlcpy(d->reason, "phantom not found: image too large", sizeof d->reason);
        return 0;
    }
    for (int bx = 0; bx < cw; bx++) {
        double tx = an_lattice_t(w, f, bx - kx);
        bx0[bx] = (int)floor(tx);
        bx1[bx] = (int)ceil(tx);
    }
    for (int by = 0; by < ch; by++) {
        double ty = an_lattice_t(h, f, by - ky);
        int y0 = (int)floor(ty), y1 = (int)ceil(ty);
        const float *ra = im->px + (ptrdiff_t)y0 * im->stride,
                    *rb = im->px + (ptrdiff_t)y1 * im->stride;
        for (int bx = 0; bx < cw; bx++) {
            int x0 = bx0[bx], x1 = bx1[bx];
            double acc = 0;
            int c = 0;
            if (x1 == x0 + 1 && y1 == y0 + 1 && isfinite(ra[x0]) && isfinite(ra[x1]) &&
                isfinite(rb[x0]) && isfinite(rb[x1])) {
                /* the common case, in the order of the loops below */
                acc += ra[x0];
                acc += ra[x1];
                acc += rb[x0];
                acc += rb[x1];
                c = 4;
            } else {
                for (int y = y0; y <= y1; y++) {
                    const float *r = im->px + (ptrdiff_t)y * im->stride;
                    for (int x = x0; x <= x1; x++)
                        if (isfinite(r[x])) {
                            acc += r[x];
                            c++;
                        }
                }
            }
            float m = c ? (float)(acc / c) : NAN;
            cv[(size_t)by * cw + bx] = m;
            if (c) {
                lo = m < lo ? m : lo;
                hi = m > hi ? m : hi;
            }
        }
    }
    if (!(hi > lo)) {
        sw_strlcpy(d->reason, "phantom not found: the image is uniform", sizeof d->reason);
        return 0;
    }
    double t = otsu(cv, cn, lo, hi);
    d->thresh = t;
    unsigned char *m = wk->mask;
    for (size_t q = 0; q < cn; q++)
        m[q] = cv[q] > t;
    size_t best = 0;
    int seed = -1;
    for (size_t q = 0; q < cn; q++)
        if (m[q] == 1) {
            size_t c = flood(m, wk->stack, cw, ch, (int)q, 1, 2);
            if (c > best) {
                best = c;
                seed = (int)q;
            }
        }
    if (seed < 0) {
        sw_strlcpy(d->reason, "phantom not found: nothing above the threshold", sizeof d->reason);
        return 0;
    }
    flood(m, wk->stack, cw, ch, seed, 2, 3);
    /* Holes: whatever the outside cannot reach through non-phantom blocks. */
    for (int x = 0; x < cw; x++) {
        size_t q0 = x, q1 = (size_t)(ch - 1) * cw + x;
        if (m[q0] != 3 && m[q0] != 4)
            flood(m, wk->stack, cw, ch, (int)q0, m[q0], 4);
        if (m[q1] != 3 && m[q1] != 4)
            flood(m, wk->stack, cw, ch, (int)q1, m[q1], 4);
    }
    for (int y = 0; y < ch; y++) {
        size_t q0 = (size_t)y * cw, q1 = q0 + cw - 1;
        if (m[q0] != 3 && m[q0] != 4)
            flood(m, wk->stack, cw, ch, (int)q0, m[q0], 4);
        if (m[q1] != 3 && m[q1] != 4)
            flood(m, wk->stack, cw, ch, (int)q1, m[q1], 4);
    }
    double sx = 0, sy = 0;
    size_t cnt = 0;
    for (int y = 0; y < ch; y++)
        for (int x = 0; x < cw; x++)
            if (m[(size_t)y * cw + x] != 4) {
                sx += x;
                sy += y;
                cnt++;
            }
    if (cnt < 12 || cnt > cn * 0.95) {
        sw_strlcpy(d->reason, "phantom not found: no disc-like object", sizeof d->reason);
        return 0;
    }
    /* block (bx, by) is centred on pixel (an_lattice_t(w, f, bx - kx), an_lattice_t(h, f, by - ky))
     */
    double xc = an_lattice_t(w, f, 0) + (sx / cnt - kx) * f,
           yc = an_lattice_t(h, f, 0) + (sy / cnt - ky) * f;
    double R = sqrt(cnt * f * f * col * row / M_PI);
    /* An absurd PixelSpacing (1e300 mm from a damaged file) makes R infinite or huge, and the ray
     * sampling below would convert it to int (undefined); no phantom is a kilometre wide. */
    if (!(R > 0 && R < 1e6)) {
        sw_strlcpy(d->reason, "phantom not found: pixel spacing gives no plausible size",
                   sizeof d->reason);
        return 0;
    }
    /* Fluid level: median of the blocks inside 0.6 R. */
    {
        float *buf = (float *)wk->stack; /* free now: cn ints hold cn floats */
        size_t nb = 0;
        double r6 = 0.6 * R;
        for (int y = 0; y < ch; y++)
            for (int x = 0; x < cw; x++) {
                double dx = (an_lattice_t(w, f, x - kx) - xc) * col,
                       dy = (an_lattice_t(h, f, y - ky) - yc) * row;
                float v = cv[(size_t)y * cw + x];
                if (dx * dx + dy * dy <= r6 * r6 && isfinite(v))
                    buf[nb++] = v;
            }
        d->fluid = an_median(buf, nb);
    }
    if (!refine) {
        /* Coarse only: centre and radius from the filled mask, which must be a round object of
         * about the model's size (its second moments isotropic). */
        double sxx = 0, syy = 0, sxy = 0, mx = sx / cnt, my = sy / cnt;
        for (int y = 0; y < ch; y++)
            for (int x = 0; x < cw; x++)
                if (m[(size_t)y * cw + x] != 4) {
                    double ax = (x - mx) * f * col, ay = (y - my) * f * row;
                    sxx += ax * ax;
                    syy += ay * ay;
                    sxy += ax * ay;
                }
        sxx /= cnt;
        syy /= cnt;
        sxy /= cnt;
        /* Compact: the mask fills the circle of its own area and little lies outside it (a
         * thresholded noise field spreads everywhere). */
        size_t in = 0, inside = 0, outside = 0;
        for (int y = 0; y < ch; y++)
            for (int x = 0; x < cw; x++) {
                double ax = (an_lattice_t(w, f, x - kx) - xc) * col,
                       ay = (an_lattice_t(h, f, y - ky) - yc) * row;
                double rr = ax * ax + ay * ay;
                int msk = m[(size_t)y * cw + x] != 4;
                if (rr <= 0.81 * R * R) {
                    in++;
                    inside += msk;
                } else if (rr >= 1.21 * R * R) {
                    outside += msk;
                }
            }
        if (in == 0 || inside < 0.95 * in || outside > 0.03 * cnt) {
            sw_strlcpy(d->reason, "phantom not found: no compact disc", sizeof d->reason);
            return 0;
        }
        double tr = sxx + syy, det = sxx * syy - sxy * sxy, disc = sqrt(fmax(0, tr * tr / 4 - det));
        double l1 = tr / 2 + disc, l2 = tr / 2 - disc;
        if (!(l2 > 0) || l1 / l2 > 1.3 ||
            !(R > 0.6 * model->radius_mm && R < 1.4 * model->radius_mm)) {
            sw_strlcpy(d->reason, "phantom not found: no disc of the model's size",
                       sizeof d->reason);
            return 0;
        }
        d->xc = xc;
        d->yc = yc;
        d->r_mm = R;
        d->rms_mm = NAN;
        d->found = 1;
        return 0;
    }
    /* Sub-pixel edge points along rays: the crossing of the level halfway between the local fluid
     * and air, found walking inward from outside. */
    double X[NRAY], Y[NRAY];
    unsigned char use[NRAY];
    int ne = 0;
    double step = 0.5, r0 = 0.82 * R, r1 = 1.18 * R;
    int ns = (int)((r1 - r0) / step) + 1;
    double prof[512];
    if (ns > 512)
        ns = 512, step = (r1 - r0) / (ns - 1);
    double Xc = xc * col, Yc = yc * row;
    for (int k = 0; k < NRAY; k++) {
        double ph = 2 * M_PI * k / NRAY, cx = cos(ph), cy = sin(ph);
        for (int i = 0; i < ns; i++) {
            double rr = r0 + i * step;
            prof[i] = an_bilinear(im, (Xc + rr * cx) / col, (Yc + rr * cy) / row);
        }
        double in = an_mean_range(prof, ns, 0, (int)((0.1 * R) / step));
        double out = an_mean_range(prof, ns, (int)((0.26 * R) / step), ns - 1);
        if (!isfinite(in) || !isfinite(out) || !(in - out > 0.25 * (d->fluid - lo)))
            continue;
        double lev = 0.5 * (in + out);
        int start = ns - 1;
        while (start > 0 && !isfinite(prof[start]))
            start--;
        double fi = an_walk_cross(prof, ns, start, -1, lev, 0);
        if (!isfinite(fi))
            continue;
        double rr = r0 + fi * step;
        X[ne] = Xc + rr * cx;
        Y[ne] = Yc + rr * cy;
        use[ne] = 1;
        ne++;
    }
    double fx = NAN, fy = NAN, fr = NAN;
    for (int round = 0; round < 3; round++) {
        if (kasa(X, Y, use, ne, &fx, &fy, &fr)) {
            sw_strlcpy(d->reason, "phantom not found: the edge is not a circle", sizeof d->reason);
            return 0;
        }
        double res[NRAY];
        float ab[NRAY];
        int nu = 0;
        for (int i = 0; i < ne; i++) {
            res[i] = hypot(X[i] - fx, Y[i] - fy) - fr;
            if (use[i])
                ab[nu++] = (float)fabs(res[i]);
        }
        double mad = an_median(ab, (size_t)nu);
        double lim = fmax(3 * 1.4826 * mad, 0.4);
        for (int i = 0; i < ne; i++)
            use[i] = fabs(res[i]) <= lim;
    }
    /* Geometric refinement (Gauss-Newton on the distances) over the inliers. */
    for (int it = 0; it < 5; it++) {
        double JtJ[3][3] = {{0}}, Jtr[3] = {0};
        for (int i = 0; i < ne; i++) {
            if (!use[i])
                continue;
            double dx = X[i] - fx, dy = Y[i] - fy, di = hypot(dx, dy);
            if (di <= 0)
                continue;
            double J[3] = {-dx / di, -dy / di, -1}, r = di - fr;
            for (int a = 0; a < 3; a++) {
                Jtr[a] += J[a] * r;
                for (int b = 0; b < 3; b++)
                    JtJ[a][b] += J[a] * J[b];
            }
        }
        /* Solve JtJ delta = -Jtr (3x3, Cramer). */
        double(*A)[3] = JtJ;
        double det = A[0][0] * (A[1][1] * A[2][2] - A[1][2] * A[2][1]) -
                     A[0][1] * (A[1][0] * A[2][2] - A[1][2] * A[2][0]) +
                     A[0][2] * (A[1][0] * A[2][1] - A[1][1] * A[2][0]);
        if (!(fabs(det) > 1e-12))
            break;
        double b[3] = {-Jtr[0], -Jtr[1], -Jtr[2]}, dl[3];
        for (int c = 0; c < 3; c++) {
            double M[3][3];
            memcpy(M, A, sizeof M);
            for (int r = 0; r < 3; r++)
                M[r][c] = b[r];
            dl[c] = (M[0][0] * (M[1][1] * M[2][2] - M[1][2] * M[2][1]) -
                     M[0][1] * (M[1][0] * M[2][2] - M[1][2] * M[2][0]) +
                     M[0][2] * (M[1][0] * M[2][1] - M[1][1] * M[2][0])) /
                    det;
        }
        fx += dl[0];
        fy += dl[1];
        fr += dl[2];
        if (fabs(dl[0]) + fabs(dl[1]) + fabs(dl[2]) < 1e-6)
            break;
    }
    int ni = 0;
    double ss = 0;
    for (int i = 0; i < ne; i++)
        if (use[i]) {
            double r = hypot(X[i] - fx, Y[i] - fy) - fr;
            ss += r * r;
            ni++;
        }
    d->n_edge = ni;
    d->rms_mm = ni ? sqrt(ss / ni) : NAN;
    double rmod = model->radius_mm;
    double fill = cnt * f * f * col * row / (M_PI * fr * fr);
    if (ni < NRAY / 3 || !(d->rms_mm < 1.5) || !(fr > 0.6 * rmod && fr < 1.4 * rmod) ||
        !(fill > 0.8 && fill < 1.15)) {
        sw_strlcpy(d->reason, "phantom not found: no disc of the model's size", sizeof d->reason);
        return 0;
    }
    d->xc = fx / col;
    d->yc = fy / row;
    d->r_mm = fr;
    d->found = 1;
    return 0;
}

/* Pixels of the air around the disc, in four bands (left, right, top, bottom of the stored image).
 * Every pixel of a border-trimmed range that is symmetric under flips and transposition is used,
 * so the estimate does not depend on how the image happens to be stored. Two passes over the
 * rows (with = 0: count the bands; 1: fill each band's part of scratch); per row only the pixels
 * that may lie outside the excluded circle are visited (one pixel of margin for rounding). */
/* The row predicates of air_rows, each evaluated exactly as the per-pixel tests would be. */
typedef struct air_row {
    double xc, col, dy2, ady, r2;
} air_row;

static int air_excluded(const air_row *r, int x)
{
    double dx = (x - r->xc) * r->col;
    return dx * dx + r->dy2 < r->r2;
}

/* band 0 (left): fabs(dx) >= ady and dx < 0; band 1 (right): fabs(dx) >= ady and dx >= 0 */
static int air_past_left(const air_row *r, int x)
{
    double dx = (x - r->xc) * r->col;
    return !(fabs(dx) >= r->ady && dx < 0);
}

static int air_in_right(const air_row *r, int x)
{
    double dx = (x - r->xc) * r->col;
    return fabs(dx) >= r->ady && dx >= 0;
}

/* First x in [a, b] where pred (false, then true along x) holds; b + 1 when nowhere. */
static int air_first(const air_row *r, int (*pred)(const air_row *, int), int want, int a, int b)
{
    int lo = a, hi = b + 1;
    while (lo < hi) {
        int mid = lo + (hi - lo) / 2;
        if (pred(r, mid) == want)
            hi = mid;
        else
            lo = mid + 1;
    }
    return lo;
}

/* Pixels of the air around the disc, in four bands (left, right, top, bottom of the stored image).
 * Every pixel of a border-trimmed range that is symmetric under flips and transposition is used,
 * so the estimate does not depend on how the image happens to be stored. Two passes over the
 * rows (with = 0: count the bands; 1: fill each band's part of scratch). Along a row the tests
 * are monotone on either side of the disc's centre, so the row splits into runs of one band
 * outside the excluded circle, whose ends are found by bisection with the same expressions; only
 * the pixels' values are then looked at one by one. */
static void air_rows(const an_image *im, const an_disc *d, double rmin, int with, size_t cnt[4],
                     size_t *zeros, const size_t *start, float *scratch)
{
    int w = im->width, h = im->height;
    double col = im->col_mm > 0 ? im->col_mm : 1, row = im->row_mm > 0 ? im->row_mm : 1;
    if (w < 5)
        return;
    int xa = 2, xb = w - 3, xm = (int)floor(d->xc);
    if (xm < xa - 1)
        xm = xa - 1;
    if (xm > xb)
        xm = xb;
    for (int y = 2; y < h - 2; y++) {
        double dy = (y - d->yc) * row;
        air_row r = {d->xc, col, dy * dy, fabs(dy), rmin * rmin};
        /* the excluded circle: [e0, e1) */
        int e0 = air_first(&r, air_excluded, 1, xa, xm);
        int e1 = e0 <= xm ? air_first(&r, air_excluded, 0, xm + 1, xb) : xm + 1;
        if (e0 > xm && e1 == xm + 1 && xm + 1 <= xb && air_excluded(&r, xm + 1))
            e0 = xm + 1, e1 = air_first(&r, air_excluded, 0, xm + 1, xb);
        /* bands: 0 on [xa, l1), bv on [l1, r0), 1 on [r0, xb] */
        int l1 = air_first(&r, air_past_left, 1, xa, xb);
        int r0 = air_first(&r, air_in_right, 1, l1, xb);
        int bv = dy < 0 ? 2 : 3;
        int cut[4] = {xa, l1, r0, xb + 1};
        const float *pr = im->px + (ptrdiff_t)y * im->stride;
        for (int seg = 0; seg < 3; seg++) {
            int s0 = cut[seg], s1 = cut[seg + 1], b = seg == 0 ? 0 : seg == 1 ? bv : 1;
            /* the segment minus the excluded interval [e0, e1): the part before it and after */
            int c0 = e0 < e1 ? (e0 < s0 ? s0 : e0 > s1 ? s1 : e0) : s1;
            int c1 = e0 < e1 ? (e1 < s0 ? s0 : e1 > s1 ? s1 : e1) : s1;
            int pa[2] = {s0, c1}, pb[2] = {c0, s1};
            size_t k = cnt[b], z = 0;
            for (int part = 0; part < 2; part++) {
                if (with) {
                    float *dst = scratch + start[b];
                    for (int x = pa[part]; x < pb[part]; x++)
                        if (isfinite(pr[x]))
                            dst[k++] = pr[x];
                } else {
                    for (int x = pa[part]; x < pb[part]; x++)
                        if (isfinite(pr[x])) {
                            k++;
                            z += pr[x] == 0;
                        }
                }
            }
            cnt[b] = k;
            if (!with)
                *zeros += z;
        }
    }
}

double an_noise_air(const an_image *im, const an_disc *d, float *scratch)
{
    if (!d->found)
        return NAN;
    double rmin = d->r_mm + fmax(10.0, 0.1 * d->r_mm);
    size_t cnt[4] = {0}, start[4], zeros = 0, total;
    air_rows(im, d, rmin, 0, cnt, &zeros, NULL, NULL);
    total = cnt[0] + cnt[1] + cnt[2] + cnt[3];
    if (total < 200 || zeros > total * 0.3)
        return NAN;
    start[0] = 0;
    for (int b = 1; b < 4; b++)
        start[b] = start[b - 1] + cnt[b - 1];
    size_t fill[4] = {0};
    air_rows(im, d, rmin, 1, fill, NULL, start, scratch);
    double s[4];
    int ns = 0;
    for (int b = 0; b < 4; b++)
        if (cnt[b] >= 100)
            s[ns++] = an_median(scratch + start[b], cnt[b]) / sqrt(2 * log(2.0));
    if (ns == 0)
        return NAN;
    /* Sort ascending; ghosts raise the bands they fall in. */
    for (int i = 1; i < ns; i++)
        for (int j = i; j > 0 && s[j] < s[j - 1]; j--) {
            double t = s[j];
            s[j] = s[j - 1];
            s[j - 1] = t;
        }
    return ns >= 2 ? 0.5 * (s[0] + s[1]) : s[0];
}

/* Neighbour differences (along rows and along columns) of pixel pairs inside a central disc of half
 * the phantom's radius: in the Gaussian regime each has SD sigma sqrt 2. Pairs both ways and the
 * absolute deviation from the median make the set, and so the estimate, independent of the
 * storage order. */
double an_noise_fluid(const an_image *im, const an_disc *d, float *scratch)
{
    if (!d->found)
        return NAN;
    double col = im->col_mm > 0 ? im->col_mm : 1, row = im->row_mm > 0 ? im->row_mm : 1;
    double rr = 0.5 * d->r_mm;
    size_t n = 0, cap = (size_t)im->width * im->height;
    int y0 = (int)fmax(0, floor(d->yc - rr / row)),
        y1 = (int)fmin(im->height - 1, ceil(d->yc + rr / row));
    int x0 = (int)fmax(0, floor(d->xc - rr / col)),
        x1 = (int)fmin(im->width - 1, ceil(d->xc + rr / col));
    for (int y = y0; y <= y1; y++)
        for (int x = x0; x <= x1; x++) {
            double dx = (x - d->xc) * col, dy = (y - d->yc) * row;
            if (dx * dx + dy * dy > rr * rr)
                continue;
            const float *p = im->px + (ptrdiff_t)y * im->stride + x;
            for (int dir = 0; dir < 2; dir++) {
                int x2 = x + !dir, y2 = y + dir;
                double ex = (x2 - d->xc) * col, ey = (y2 - d->yc) * row;
                if (x2 >= im->width || y2 >= im->height || ex * ex + ey * ey > rr * rr)
                    continue;
                float q = dir ? p[im->stride] : p[1];
                if (isfinite(p[0]) && isfinite(q) && n < cap)
                    scratch[n++] = q - p[0];
            }
        }
    if (n < 100)
        return NAN;
    double med = an_median(scratch, n);
    for (size_t i = 0; i < n; i++)
        scratch[i] = (float)fabs(scratch[i] - med);
    return 1.4826 * an_median(scratch, n) / sqrt(2.0);
}

/* The noise's correlation between neighbouring pixels, as the factor by which it raises the
 * variance of a smooth weighted sum of pixels over what independent pixels would give:
 * F = sum over lags of rho(lag) (1 for white noise; about 2 per axis for an image interpolated
 * 2x by zero filling, since sinc(k / 2) sums to 2; filtered k-space raises it too). Measured in
 * the fluid (where the magnitude's noise is the real channel's, sign and all) on tiles of 16 x 16
 * pixels inside 0.6 of the radius, each less a fitted plane (shading); lags up to 2 pixels; tiles
 * with more than twice the median variance (structure: a grid, discs) are left out, and the
 * median of the rest is taken (at most 1024 tiles, from the top). NAN when fewer than 8 tiles
 * remain. */
double an_noise_corr(const an_image *im, const an_disc *d)
{
    enum { T = 16, LAGS = 12, TILES = 1024 };
    const double mid = 0.5 * (T - 1);
    double sxx = 0; /* sum of (k - mid)^2 over a tile's side: the plane fit's denominator */
    for (int k = 0; k < T; k++)
        sxx += (k - mid) * (k - mid);
    static const int lag[LAGS][2] = {{1, 0},  {2, 0},  {-2, 1}, {-1, 1}, {0, 1}, {1, 1},
                                     {2, 1},  {-2, 2}, {-1, 2}, {0, 2},  {1, 2}, {2, 2}};
    if (!d->found)
        return NAN;
    double col = im->col_mm > 0 ? im->col_mm : 1, row = im->row_mm > 0 ? im->row_mm : 1;
    double rr = 0.6 * d->r_mm;
    size_t cap = TILES, nt = 0;
    float fv[TILES], vv[TILES], tmp[TILES];
    int x0 = (int)ceil(d->xc - rr / col), y0 = (int)ceil(d->yc - rr / row);
    for (int ty = y0; ty + T <= d->yc + rr / row && nt < cap; ty += T)
        for (int tx = x0; tx + T <= d->xc + rr / col && nt < cap; tx += T) {
            if (tx < 0 || ty < 0 || tx + T > im->width || ty + T > im->height)
                continue;
            /* every corner inside the circle */
            int inside = 1;
            for (int c = 0; c < 4; c++) {
                double ex = (tx + (c & 1) * (T - 1) - d->xc) * col,
                       ey = (ty + (c >> 1) * (T - 1) - d->yc) * row;
                inside &= ex * ex + ey * ey <= rr * rr;
            }
            if (!inside)
                continue;
            double r[T][T], m = 0, bx = 0, by = 0;
            int ok = 1;
            for (int y = 0; y < T && ok; y++)
                for (int x = 0; x < T; x++) {
                    double v = im->px[(ptrdiff_t)(ty + y) * im->stride + tx + x];
                    ok &= isfinite(v);
                    r[y][x] = v;
                    m += v;
                    bx += v * (x - mid);
                    by += v * (y - mid);
                }
            if (!ok)
                continue;
            m /= T * T;
            bx /= sxx * T;
            by /= sxx * T;
            double var = 0;
            for (int y = 0; y < T; y++)
                for (int x = 0; x < T; x++) {
                    r[y][x] -= m + bx * (x - mid) + by * (y - mid);
                    var += r[y][x] * r[y][x];
                }
            var /= T * T - 3;
            if (!(var > 0))
                continue;
            double f = 1;
            for (int k = 0; k < LAGS; k++) {
                int dx = lag[k][0], dy = lag[k][1], np = 0;
                double c = 0;
                for (int y = 0; y + dy < T; y++)
                    for (int x = dx < 0 ? -dx : 0; x < T && x + dx < T; x++) {
                        c += r[y][x] * r[y + dy][x + dx];
                        np++;
                    }
                f += 2 * c / (np * var);
            }
            fv[nt] = (float)f;
            vv[nt++] = (float)var;
        }
    if (nt < 8)
        return NAN;
    memcpy(tmp, vv, nt * sizeof *tmp);
    double vmed = an_median(tmp, nt);
    size_t k = 0;
    for (size_t i = 0; i < nt; i++)
        if (vv[i] <= 2 * vmed)
            tmp[k++] = fv[i];
    return k >= 8 ? an_median(tmp, k) : NAN;
}

double an_fluid_mean(const an_image *im, const an_disc *d, double frac, float *scratch)
{
    if (!d->found)
        return NAN;
    double col = im->col_mm > 0 ? im->col_mm : 1, row = im->row_mm > 0 ? im->row_mm : 1;
    double rr = frac * d->r_mm;
    size_t n = 0;
    for (int y = (int)fmax(0, d->yc - rr / row); y <= (int)fmin(im->height - 1, d->yc + rr / row);
         y++)
        for (int x = (int)fmax(0, d->xc - rr / col);
             x <= (int)fmin(im->width - 1, d->xc + rr / col); x++) {
            double dx = (x - d->xc) * col, dy = (y - d->yc) * row;
            float v = im->px[(ptrdiff_t)y * im->stride + x];
            if (dx * dx + dy * dy <= rr * rr && isfinite(v))
                scratch[n++] = v;
        }
    if (n < 20)
        return NAN;
    double med = an_median(scratch, n), s = 0;
    size_t c = 0;
    /* an_median reorders; the values are all still there. */
    for (size_t i = 0; i < n; i++)
        if (scratch[i] >= 0.5 * med) {
            s += scratch[i];
            c++;
        }
    return c ? s / c : NAN;
}
