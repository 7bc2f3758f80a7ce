/* html.c: the self-contained HTML report: summary per scanner, trend charts (svg.c), annotated
 * images as data: URIs, the review caution and the inline check script. */
#include <errno.h>
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#include "html.h"
#include "report.h"
#include "rp_html_int.h"

/* ---- buffer ---- */

void rp_buf_free(rp_buf *b)
{
    if (!b)
        return;
    free(b->s);
    memset(b, 0, sizeof *b);
}

static int reserve(rp_buf *b, size_t more)
{
    if (b->failed)
        return 0;
    if (more > SIZE_MAX - b->len - 1) {
        b->failed = 1;
        return 0;
    }
    size_t need = b->len + more + 1;
    if (need <= b->cap)
        return 1;
    size_t cap = b->cap ? b->cap : 4096;
    while (cap < need) {
        if (cap > SIZE_MAX / 2) {
            cap = need;
            break;
        }
        cap *= 2;
    }
    char *s = realloc(b->s, cap);
    if (!s) {
        b->failed = 1;
        return 0;
    }
    b->s = s;
    b->cap = cap;
    return 1;
}

void rp_buf_putn(rp_buf *b, const char *s, size_t n)
{
    if (!s || !reserve(b, n))
        return;
    memcpy(b->s + b->len, s, n);
    b->len += n;
    b->s[b->len] = '\0';
}

void rp_buf_put(rp_buf *b, const char *s)
{
    if (s)
        rp_buf_putn(b, s, strlen(s));
}

void rp_buf_printf(rp_buf *b, const char *fmt, ...)
{
    va_list ap;
    char small[512];
    va_start(ap, fmt);
    int n = vsnprintf(small, sizeof small, fmt, ap);
    va_end(ap);
    if (n < 0) {
        b->failed = 1;
        return;
    }
    if ((size_t)n < sizeof small) {
        rp_buf_putn(b, small, (size_t)n);
        return;
    }
    if (!reserve(b, (size_t)n))
        return;
    va_start(ap, fmt);
    vsnprintf(b->s + b->len, (size_t)n + 1, fmt, ap);
    va_end(ap);
    b->len += (size_t)n;
}

void rp_buf_esc(rp_buf *b, const char *s)
{
    if (!s)
        return;
    const char *run = s;
    for (; *s; s++) {
        const char *rep = NULL;
        switch (*s) {
        case '&': rep = "&amp;"; break;
        case '<': rep = "&lt;"; break;
        case '>': rep = "&gt;"; break;
        case '"': rep = "&quot;"; break;
        case '\'': rep = "&#39;"; break;
        default: break;
        }
        if (rep) {
            rp_buf_putn(b, run, (size_t)(s - run));
            rp_buf_put(b, rep);
            run = s + 1;
        }
    }
    rp_buf_putn(b, run, (size_t)(s - run));
}

void rp_buf_num(rp_buf *b, double v, int digits)
{
    if (!isfinite(v))
        return;
    /* The shortest form that reads back as the same double, up to digits. */
    char s[40];
    for (int p = 1; p <= digits; p++) {
        snprintf(s, sizeof s, "%.*g", p, v);
        if (strtod(s, NULL) == v)
            break;
    }
    rp_buf_put(b, s);
}

/* ---- images ---- */

static const char B64[] = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";

static void put_base64(rp_buf *b, const unsigned char *p, size_t n)
{
    char q[4];
    if (!reserve(b, (n + 2) / 3 * 4))
        return;
    for (size_t i = 0; i < n; i += 3) {
        unsigned v = (unsigned)p[i] << 16;
        if (i + 1 < n)
            v |= (unsigned)p[i + 1] << 8;
        if (i + 2 < n)
            v |= p[i + 2];
        q[0] = B64[v >> 18 & 63];
        q[1] = B64[v >> 12 & 63];
        q[2] = i + 1 < n ? B64[v >> 6 & 63] : '=';
        q[3] = i + 2 < n ? B64[v & 63] : '=';
        rp_buf_putn(b, q, 4);
    }
}

/* Reads a PNG whole. Ownership: on success *data is the caller's (free); else NULL and why. */
static int read_png(const char *path, unsigned char **data, size_t *n, char *why, size_t nwhy)
{
    static const unsigned char SIG[8] = {0x89, 'P', 'N', 'G', '\r', '\n', 0x1a, '\n'};
    FILE *f = NULL;
    struct stat st;
    int ok = 0;
    *data = NULL;
    *n = 0;
    if (!(f = fopen(path, "rb"))) {
        snprintf(why, nwhy, "%s", strerror(errno));
        goto out;
    }
    if (fstat(fileno(f), &st) != 0 || !S_ISREG(st.st_mode)) {
        snprintf(why, nwhy, "not a regular file");
        goto out;
    }
    if (st.st_size < 8 || (unsigned long long)st.st_size > RP_HTML_MAX_IMAGE) {
        snprintf(why, nwhy, "size %lld bytes is out of range", (long long)st.st_size);
        goto out;
    }
    if (!(*data = malloc((size_t)st.st_size))) {
        snprintf(why, nwhy, "out of memory");
        goto out;
    }
    if (fread(*data, 1, (size_t)st.st_size, f) != (size_t)st.st_size) {
        snprintf(why, nwhy, "short read");
        goto out;
    }
    if (memcmp(*data, SIG, 8) != 0) {
        snprintf(why, nwhy, "not a PNG file");
        goto out;
    }
    *n = (size_t)st.st_size;
    ok = 1;
out:
    if (f)
        fclose(f);
    if (!ok) {
        free(*data);
        *data = NULL;
    }
    return ok;
}

/* ---- page ---- */

static const char CSS[] =
    "body{margin:0;background:#F4F2EE;color:#1B1B1B;font:14px/1.45 'DejaVu Sans',Verdana,"
    "sans-serif}"
    "main{max-width:1120px;margin:0 auto;padding:0 20px 40px}"
    "header.top{background:#22313F;color:#FFFFFF;padding:18px 20px 14px}"
    "header.top h1{margin:0 auto;max-width:1120px;font-size:22px;font-weight:600}"
    "header.top p{margin:4px auto 0;max-width:1120px;color:#D9E2EA}"
    ".caution{margin:18px 0;padding:10px 14px;border-left:6px solid #E59A1A;background:#FFF7E8}"
    "section.scanner{background:#FFFFFF;margin:22px 0;padding:14px 18px;border:1px solid #D6D2CA}"
    "h2{font-size:18px;margin:4px 0 8px}h3{font-size:15px;margin:16px 0 6px}"
    "table{border-collapse:collapse;margin:6px 0}th,td{padding:4px 10px;text-align:left;"
    "border-bottom:1px solid #E2DED6;vertical-align:top}th{background:#EDEAE4;font-weight:600}"
    "td.num{text-align:right;font-variant-numeric:tabular-nums}"
    ".v{display:inline-block;min-width:5.5em;padding:1px 6px;border-radius:3px;font-weight:700;"
    "font-size:12px;text-align:center;letter-spacing:.03em}"
    ".v-pass{background:#1F6DB0;color:#FFFFFF}.v-warn{background:#E59A1A;color:#1B1B1B}"
    ".v-fail{background:#C24A0E;color:#FFFFFF}.v-unmeasurable,.v-info,.v-none{background:#6B6B6B;"
    "color:#FFFFFF}.v-drift{background:#8E3F7E;color:#FFFFFF}.v-ok{background:#DCE8F3;"
    "color:#1B1B1B}"
    "figure.chart{margin:10px 0 18px;padding:0}figure.chart figcaption{font-weight:600}"
    "p.stats{margin:2px 0 0;color:#444;font-size:12.5px}"
    "ul.legend{list-style:none;padding:0;margin:4px 0;font-size:12px;color:#444}"
    "ul.legend li{display:inline-block;margin-right:14px}"
    "ul.alarms{padding-left:18px}ul.alarms li{margin:3px 0}"
    "figure.image{display:inline-block;margin:8px 12px 8px 0;vertical-align:top;max-width:100%}"
    "figure.image img{max-width:100%;border:1px solid #D6D2CA}"
    "figure.image figcaption{font-size:12.5px;color:#444;max-width:760px}"
    "footer{color:#555;font-size:12.5px;margin-top:26px}"
    ".note{color:#555}";

/* Counts the points of every chart into the DOM, checks them against what the page expects, and,
 * once the images are decoded, how many rendered: a browser test reads the attributes on body. */
static const char SCRIPT[] =
    "(function(){var b=document.body,charts=document.querySelectorAll('svg.trend'),total=0,"
    "bad=0;for(var i=0;i<charts.length;i++){var s=charts[i],n=s.querySelectorAll('.pt').length;"
    "s.setAttribute('data-counted',String(n));total+=n;if(String(n)!==s.getAttribute("
    "'data-expected'))bad++;}b.setAttribute('data-checked-charts',String(charts.length));"
    "b.setAttribute('data-checked-points',String(total));b.setAttribute('data-check',bad?"
    "'mismatch':'ok');function imgs(){var im=document.querySelectorAll('figure.image img'),ok=0;"
    "for(var j=0;j<im.length;j++)if(im[j].complete&&im[j].naturalWidth>0)ok++;"
    "b.setAttribute('data-images-rendered',String(ok));}if(document.readyState==='complete')"
    "imgs();else window.addEventListener('load',imgs);})();";

static void verdict_chip(rp_buf *b, const char *v)
{
    const char *cls = v && *v ? v : "none";
    rp_buf_put(b, "<span class=\"v v-");
    rp_buf_esc(b, cls);
    rp_buf_put(b, "\">");
    for (const char *p = v && *v ? v : "none"; *p; p++) {
        char c = *p >= 'a' && *p <= 'z' ? (char)(*p - 32) : *p;
        rp_buf_putn(b, &c, 1);
    }
    rp_buf_put(b, "</span>");
}

/* The drift state of a chart in words, on a chip: DRIFT, IN CONTROL or NO BASELINE. */
static void status_chip(rp_buf *b, const char *status)
{
    const char *cls = "none";
    if (status && !strcmp(status, "drift"))
        cls = "drift";
    else if (status && !strcmp(status, "in control"))
        cls = "ok";
    rp_buf_printf(b, "<span class=\"v v-%s\">", cls);
    for (const char *p = status && *status ? status : "unknown"; *p; p++) {
        char c = *p >= 'a' && *p <= 'z' ? (char)(*p - 32) : *p;
        rp_buf_putn(b, &c, 1);
    }
    rp_buf_put(b, "</span>");
}

static void value_text(rp_buf *b, double v, double u, const char *unit)
{
    if (!isfinite(v)) {
        rp_buf_put(b, "&#8212;");
        return;
    }
    rp_buf_printf(b, "%.3f", v);
    if (isfinite(u))
        rp_buf_printf(b, " &#177; %.3f", u);
    if (unit && *unit) {
        rp_buf_put(b, " ");
        rp_buf_esc(b, unit);
    }
}

static void overview(rp_buf *b, const rp_report *r)
{
    rp_buf_put(b, "<section class=\"overview\"><h2>Scanners</h2><table><thead><tr><th>Scanner</th>"
                  "<th>Model</th><th>Series</th><th>Latest series</th><th>Its verdict</th>"
                  "<th>Results pass / warn / fail / unmeasurable</th><th>Open drift alarms</th>"
                  "</tr></thead><tbody>");
    for (int i = 0; i < r->n_sections; i++) {
        const rp_scanner_section *s = &r->sec[i];
        rp_buf_printf(b, "<tr><td><a href=\"#scanner-%d\">", i + 1);
        rp_buf_esc(b, s->name);
        rp_buf_put(b, "</a></td><td>");
        rp_buf_esc(b, s->model);
        rp_buf_printf(b, "</td><td class=\"num\">%d</td><td>", s->n_series);
        rp_buf_esc(b, s->last_date ? s->last_date : "none in the period");
        rp_buf_put(b, "</td><td>");
        verdict_chip(b, s->last_verdict);
        rp_buf_printf(b, "</td><td class=\"num\">%d / %d / %d / %d</td><td class=\"num\">",
                      s->n_pass, s->n_warn, s->n_fail, s->n_unmeas);
        if (s->n_open_alarms)
            rp_buf_printf(b, "<span class=\"v v-drift\">%d OPEN</span>", s->n_open_alarms);
        else
            rp_buf_put(b, "<span class=\"v v-ok\">NONE</span>");
        rp_buf_put(b, "</td></tr>");
    }
    rp_buf_put(b, "</tbody></table></section>");
}

static void legend(rp_buf *b)
{
    rp_buf_put(
        b, "<ul class=\"legend\">"
           "<li><svg width=\"12\" height=\"12\"><circle cx=\"6\" cy=\"6\" r=\"4.5\" "
           "fill=\"#1F6DB0\"/></svg> pass</li>"
           "<li><svg width=\"12\" height=\"12\"><path d=\"M6 0.5L11.5 10.5L0.5 10.5Z\" "
           "fill=\"#E59A1A\"/></svg> warn</li>"
           "<li><svg width=\"12\" height=\"12\"><rect x=\"1.5\" y=\"1.5\" width=\"9\" "
           "height=\"9\" fill=\"#C24A0E\"/></svg> fail</li>"
           "<li><svg width=\"20\" height=\"12\"><rect x=\"0\" y=\"1\" width=\"20\" height=\"10\" "
           "fill=\"#E3EEF8\"/></svg> tolerance band</li>"
           "<li><svg width=\"22\" height=\"12\"><line x1=\"0\" y1=\"6\" x2=\"22\" y2=\"6\" "
           "stroke=\"#8E3F7E\" stroke-width=\"1.8\"/></svg> EWMA, with its limits dashed</li>"
           "<li><svg width=\"22\" height=\"12\"><line x1=\"0\" y1=\"6\" x2=\"22\" y2=\"6\" "
           "stroke=\"#0B7A5D\" stroke-dasharray=\"8 3 2 3\" stroke-width=\"1.2\"/></svg> "
           "baseline mean</li>"
           "<li><svg width=\"22\" height=\"12\"><line x1=\"0\" y1=\"6\" x2=\"22\" y2=\"6\" "
           "stroke=\"#3A3A3A\" stroke-dasharray=\"2 2\" stroke-width=\"1.3\"/></svg> "
           "least-squares trend</li>"
           "<li><svg width=\"16\" height=\"16\"><circle cx=\"8\" cy=\"8\" r=\"6.5\" "
           "fill=\"none\" stroke=\"#8E3F7E\" stroke-width=\"1.6\"/></svg> out of control</li>"
           "</ul>");
}

static sw_status section(rp_buf *b, const rp_scanner_section *s, int index, rp_html_info *info,
                         sw_error *err)
{
    rp_buf_printf(b, "<section class=\"scanner\" id=\"scanner-%d\" data-station=\"", index + 1);
    rp_buf_esc(b, s->station);
    rp_buf_put(b, "\"><h2>");
    rp_buf_esc(b, s->name);
    rp_buf_put(b, "</h2><p class=\"note\">Station ");
    rp_buf_esc(b, s->station);
    if (s->serial && *s->serial) {
        rp_buf_put(b, ", serial ");
        rp_buf_esc(b, s->serial);
    }
    if (s->manufacturer && *s->manufacturer) {
        rp_buf_put(b, ", ");
        rp_buf_esc(b, s->manufacturer);
    }
    if (s->model && *s->model) {
        rp_buf_put(b, " ");
        rp_buf_esc(b, s->model);
    }
    if (s->institution && *s->institution) {
        rp_buf_put(b, ", ");
        rp_buf_esc(b, s->institution);
    }
    rp_buf_printf(b, ". %d series measured in the period.</p>", s->n_series);

    rp_buf_put(b, "<h3>Latest results</h3>");
    if (s->n_results == 0)
        rp_buf_put(b, "<p class=\"note\">No results with a tolerance in the period.</p>");
    else {
        rp_buf_put(b, "<table class=\"latest\"><thead><tr><th>Quantity</th><th>Acquired</th>"
                      "<th>Value</th><th>Verdict</th><th>Note</th></tr></thead><tbody>");
        for (int i = 0; i < s->n_results; i++) {
            const rp_result_line *l = &s->results[i];
            rp_buf_put(b, "<tr><td>");
            rp_buf_esc(b, l->label);
            rp_buf_put(b, "</td><td>");
            rp_buf_esc(b, l->date);
            rp_buf_put(b, "</td><td class=\"num\">");
            value_text(b, l->value, l->unc, l->unit);
            rp_buf_put(b, "</td><td>");
            verdict_chip(b, l->verdict);
            rp_buf_put(b, "</td><td>");
            rp_buf_esc(b, l->note);
            rp_buf_put(b, "</td></tr>");
        }
        rp_buf_put(b, "</tbody></table>");
    }

    if (s->n_hints > 0) {
        rp_buf_put(b, "<h3>Cause hints for the latest series</h3><ul class=\"hints\">");
        for (int i = 0; i < s->n_hints; i++) {
            rp_buf_put(b, "<li>");
            rp_buf_esc(b, s->hints[i]);
            rp_buf_put(b, "</li>");
        }
        rp_buf_put(b, "</ul><p class=\"note\">Hints read the numbers above the way a physicist "
                      "might; they point where to look first and are not diagnoses.</p>");
    }

    rp_buf_put(b, "<h3>Alarms</h3>");
    if (s->n_alarms == 0)
        rp_buf_put(b, "<p class=\"note\">No alerts in the period and no open drift episode.</p>");
    else {
        rp_buf_put(b, "<ul class=\"alarms\">");
        for (int i = 0; i < s->n_alarms; i++) {
            const rp_alarm *a = &s->alarms[i];
            rp_buf_put(b, "<li>");
            verdict_chip(b, a->kind);
            rp_buf_put(b, a->open ? " <strong>open</strong> " : " ");
            rp_buf_esc(b, a->date);
            rp_buf_put(b, ": ");
            rp_buf_esc(b, a->text);
            rp_buf_put(b, "</li>");
        }
        rp_buf_put(b, "</ul>");
    }

    rp_buf_put(b, "<h3>Trends</h3>");
    if (s->n_charts == 0)
        rp_buf_put(b, "<p class=\"note\">No toleranced results to chart in the period.</p>");
    else
        legend(b);
    for (int i = 0; i < s->n_charts; i++) {
        const rp_chart *c = &s->charts[i];
        char *svg = NULL;
        sw_status rc = rp_svg_chart(c, &svg, err);
        if (rc != SW_OK)
            return rc;
        rp_buf_put(b, "<figure class=\"chart\"><figcaption>");
        rp_buf_esc(b, c->title);
        rp_buf_put(b, " &#8212; ");
        status_chip(b, c->status);
        rp_buf_put(b, "</figcaption>");
        rp_buf_put(b, svg);
        free(svg);
        rp_buf_put(b, "<p class=\"stats\">");
        rp_buf_esc(b, c->summary);
        if (c->n_hidden)
            rp_buf_printf(b,
                          " %d unmeasurable result%s in the period %s no value and %s not "
                          "plotted.",
                          c->n_hidden, c->n_hidden == 1 ? "" : "s",
                          c->n_hidden == 1 ? "has" : "have", c->n_hidden == 1 ? "is" : "are");
        rp_buf_put(b, "</p></figure>");
        info->n_charts++;
        info->n_points += c->n;
    }

    rp_buf_put(b, "<h3>Annotated images</h3>");
    if (s->n_images == 0)
        rp_buf_put(b, "<p class=\"note\">No annotated images were found for this scanner.</p>");
    for (int i = 0; i < s->n_images; i++) {
        const rp_image *im = &s->images[i];
        unsigned char *data = NULL;
        size_t n = 0;
        char why[160];
        rp_buf_put(b, "<figure class=\"image\">");
        if (read_png(im->path, &data, &n, why, sizeof why)) {
            rp_buf_put(b, "<img alt=\"");
            rp_buf_esc(b, im->caption);
            rp_buf_put(b, "\" src=\"data:image/png;base64,");
            put_base64(b, data, n);
            rp_buf_put(b, "\">");
            free(data);
            info->n_images++;
        } else {
            rp_buf_put(b, "<p class=\"note\">Image not embedded: ");
            rp_buf_esc(b, im->path);
            rp_buf_put(b, ": ");
            rp_buf_esc(b, why);
            rp_buf_put(b, "</p>");
            info->n_images_missing++;
        }
        rp_buf_put(b, "<figcaption>");
        rp_buf_esc(b, im->caption);
        rp_buf_put(b, "</figcaption></figure>");
    }
    rp_buf_put(b, "</section>");
    return SW_OK;
}

static void limit_cell(rp_buf *b, double v, const char *fmt)
{
    if (isfinite(v))
        rp_buf_printf(b, fmt, v);
    else
        rp_buf_put(b, "&#8212;");
}

/* Software validation: which program versions passed their self-test, the rows of the newest. */
static void validation(rp_buf *b, const rp_report *r)
{
    rp_buf_put(b, "<section class=\"validation\" id=\"validation\"><h2>Software validation</h2>");
    const rp_selftest *own = NULL;
    for (int i = 0; i < r->n_selftests && !own; i++)
        if (r->selftests[i].program_version &&
            !strcmp(r->selftests[i].program_version, r->program_version))
            own = &r->selftests[i];
    rp_buf_put(b, "<p data-selftest-own=\"");
    rp_buf_put(b, !own ? "none" : own->passed ? "passed" : "failed");
    rp_buf_put(b, "\">");
    if (!own) {
        rp_buf_put(b, "<span class=\"v v-warn\">NOT CHECKED</span> No self-test of slicewarden ");
        rp_buf_esc(b, r->program_version);
        rp_buf_put(b, " (the version writing this report) is stored: run <code>slicewarden "
                      "selftest</code> on this installation.");
    } else {
        rp_buf_put(b, own->passed ? "<span class=\"v v-pass\">PASSED</span> "
                                  : "<span class=\"v v-fail\">FAILED</span> ");
        rp_buf_put(b, "slicewarden ");
        rp_buf_esc(b, own->program_version);
        rp_buf_put(b, " measured its self-test sweep on ");
        rp_buf_esc(b, own->started_at);
        if (own->host && *own->host) {
            rp_buf_put(b, " (host ");
            rp_buf_esc(b, own->host);
            rp_buf_put(b, ")");
        }
        rp_buf_put(b, ": ");
        rp_buf_esc(b, own->summary);
        rp_buf_put(b, ".");
    }
    rp_buf_put(b, "</p>");
    for (int i = 0; i < r->n_selftests; i++) {
        const rp_selftest *t = &r->selftests[i];
        if (t->n_rows <= 0)
            continue;
        rp_buf_put(b, "<table class=\"selftest\" data-version=\"");
        rp_buf_esc(b, t->program_version);
        rp_buf_put(b, "\"><caption>Self-test of slicewarden ");
        rp_buf_esc(b, t->program_version);
        rp_buf_put(b, ", ");
        rp_buf_esc(b, t->started_at);
        rp_buf_printf(b, ", %d simulated series, %.1f s</caption>", t->n_series, t->seconds);
        rp_buf_put(b, "<thead><tr><th>Model</th><th>Quantity</th><th>Condition</th>"
                      "<th>Measured</th><th>Bias</th><th>SD</th><th>Max |error|</th>"
                      "<th>Guaranteed |bias| / SD / fraction</th><th>Result</th></tr></thead>"
                      "<tbody>");
        for (int k = 0; k < t->n_rows; k++) {
            const rp_selftest_row *w = &t->rows[k];
            rp_buf_put(b, "<tr class=\"selftest-row\"><td>");
            rp_buf_esc(b, w->model);
            rp_buf_put(b, "</td><td>");
            rp_buf_esc(b, w->quantity);
            rp_buf_put(b, "</td><td>");
            rp_buf_esc(b, w->condition);
            rp_buf_printf(b, "</td><td class=\"num\">%d of %d</td><td class=\"num\">",
                          w->n_measured, w->n);
            limit_cell(b, w->bias, "%+.3f");
            rp_buf_put(b, "</td><td class=\"num\">");
            limit_cell(b, w->sd, "%.3f");
            rp_buf_put(b, "</td><td class=\"num\">");
            limit_cell(b, w->max_abs_error, "%.3f");
            rp_buf_put(b, " ");
            rp_buf_esc(b, w->unit);
            rp_buf_put(b, "</td><td class=\"num\">");
            limit_cell(b, w->limit_bias, "%.2f");
            rp_buf_put(b, " / ");
            limit_cell(b, w->limit_sd, "%.2f");
            rp_buf_put(b, " / ");
            limit_cell(b, w->min_fraction, "%.2f");
            rp_buf_put(b, "</td><td>");
            rp_buf_put(b, !w->guaranteed ? "<span class=\"v v-info\">INFO</span>"
                          : w->passed    ? "<span class=\"v v-pass\">PASS</span>"
                                         : "<span class=\"v v-fail\">FAIL</span>");
            rp_buf_put(b, "</td></tr>");
        }
        rp_buf_put(b, "</tbody></table>");
    }
    if (r->n_selftests > 0) {
        rp_buf_put(b, "<p class=\"note\">Stored self-tests, newest first: ");
        for (int i = 0; i < r->n_selftests; i++) {
            const rp_selftest *t = &r->selftests[i];
            if (i)
                rp_buf_put(b, "; ");
            rp_buf_esc(b, t->program_version);
            rp_buf_put(b, " on ");
            rp_buf_esc(b, t->started_at);
            rp_buf_put(b, t->passed ? " passed" : " failed");
        }
        rp_buf_put(b, ".</p>");
    }
    rp_buf_put(b, "<p class=\"note\">The self-test measures simulated series of known truth "
                  "through the same path as the service; the guaranteed limits are stated in "
                  "the documentation (accuracy). It checks the software, not the scanner.</p>"
                  "</section>");
}

sw_status rp_html_write(const char *path, const rp_report *r, rp_html_info *info, sw_error *err)
{
    sw_status rc = SW_OK;
    rp_buf b = {0};
    rp_html_info local;
    if (!info)
        info = &local;
    memset(info, 0, sizeof *info);
    if (!path || !*path || !r || (r->n_sections > 0 && !r->sec) || r->n_sections < 0)
        return sw_error_set(err, SW_EINVAL, "report: html: bad arguments");
    rp_buf_put(&b, "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
                   "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
                   "<meta name=\"generator\" content=\"slicewarden ");
    rp_buf_esc(&b, r->program_version);
    rp_buf_put(&b, "\"><title>");
    rp_buf_esc(&b, r->title);
    rp_buf_put(&b, "</title><style>");
    rp_buf_put(&b, CSS);
    rp_buf_put(&b, "</style></head>\n<body data-report=\"slicewarden\">"
                   "<header class=\"top\"><h1>");
    rp_buf_esc(&b, r->title);
    rp_buf_put(&b, "</h1><p>");
    if (r->site && *r->site) {
        rp_buf_esc(&b, r->site);
        rp_buf_put(&b, " &#183; ");
    }
    rp_buf_put(&b, "acquired ");
    if (r->period_from) {
        rp_buf_put(&b, "from ");
        rp_buf_esc(&b, r->period_from);
        rp_buf_put(&b, " ");
    }
    if (r->period_to) {
        rp_buf_put(&b, "before ");
        rp_buf_esc(&b, r->period_to);
    }
    if (!r->period_from && !r->period_to)
        rp_buf_put(&b, "at any time");
    rp_buf_put(&b, " &#183; generated ");
    rp_buf_esc(&b, r->generated_at);
    rp_buf_put(&b, "</p></header><main>");
    rp_buf_put(&b, "<aside class=\"caution\" role=\"note\"><strong>For review.</strong> These "
                   "results support, and never replace, the review of a qualified medical "
                   "physicist, who decides on the scanner's fitness for clinical use. Every "
                   "number can be re-checked from the annotated images and the stored "
                   "details.</aside>");
    overview(&b, r);
    validation(&b, r);
    for (int i = 0; i < r->n_sections && rc == SW_OK; i++)
        rc = section(&b, &r->sec[i], i, info, err);
    if (rc != SW_OK)
        goto out;
    rp_buf_put(&b, "<footer><p>Drift: ");
    rp_buf_esc(&b, r->settings);
    rp_buf_put(&b, "</p><p>Each result is one acquisition's value with its standard uncertainty "
                   "(bars). The EWMA and CUSUM charts start at the first baseline result; the "
                   "trend is a least-squares line over the monitored results. Verdicts are "
                   "always written in words; colours and shapes repeat them.</p><p>slicewarden ");
    rp_buf_esc(&b, r->program_version);
    rp_buf_put(&b, "</p></footer></main><script>");
    rp_buf_put(&b, SCRIPT);
    rp_buf_put(&b, "</script></body></html>\n");
    if (b.failed) {
        rc = sw_error_set(err, SW_ENOMEM, "report: %s: out of memory", path);
        goto out;
    }
    info->bytes = b.len;
    rc = rp_atomic_write_file(path, b.s, b.len, err);
out:
    rp_buf_free(&b);
    return rc;
}
