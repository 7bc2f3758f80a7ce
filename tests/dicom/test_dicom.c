/* test_dicom.c: the dicom/ library against outside references: DCMTK's own converters, pydicom,
 * dciodvfy (dicom3tools), pydicom's corpus of odd files, and the encoding rules of DICOM PS3.5. */
#include <criterion/criterion.h>
#include <dirent.h>
#include <errno.h>
#include <fcntl.h>
#include <ftw.h>
#include <jansson.h>
#include <math.h>
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include "dicom.h"

#ifndef SW_PYTHON3
#define SW_PYTHON3 ""
#endif
#ifndef SW_PYDICOM_DATA
#define SW_PYDICOM_DATA ""
#endif

/* Transfer syntax UIDs: DICOM PS3.6 Table A-1. */
#define TS_IMPLICIT_LE "1.2.840.10008.1.2"
#define TS_EXPLICIT_LE "1.2.840.10008.1.2.1"
#define TS_DEFLATED "1.2.840.10008.1.2.1.99"
#define TS_EXPLICIT_BE "1.2.840.10008.1.2.2"
#define TS_JPEG_BASELINE "1.2.840.10008.1.2.4.50"
#define TS_JPEG_EXTENDED "1.2.840.10008.1.2.4.51"
#define TS_JPEG_SPECTRAL "1.2.840.10008.1.2.4.53"
#define TS_JPEG_PROGRESSIVE "1.2.840.10008.1.2.4.55"
#define TS_JPEG_LOSSLESS "1.2.840.10008.1.2.4.57"
#define TS_JPEG_LOSSLESS_SV1 "1.2.840.10008.1.2.4.70"
#define TS_JPEGLS_LOSSLESS "1.2.840.10008.1.2.4.80"
#define TS_JPEGLS_NEAR "1.2.840.10008.1.2.4.81"
#define TS_RLE "1.2.840.10008.1.2.5"
/* SOP classes: DICOM PS3.4 B.5. */
#define MR_STORAGE "1.2.840.10008.5.1.4.1.1.4"
#define ENHANCED_MR_STORAGE "1.2.840.10008.5.1.4.1.1.4.1"

static char tmpdir[256];
static char *paths[1024]; /* strings from tpath and corpus, freed at teardown */
static int npaths;

static int rm_entry(const char *p, const struct stat *sb, int flag, struct FTW *ftw)
{
    (void)sb;
    (void)flag;
    (void)ftw;
    return remove(p);
}

static void setup(void)
{
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(dcm_init(&e), SW_OK, "dcm_init: %s", e.msg);
    const char *t = getenv("TMPDIR");
    snprintf(tmpdir, sizeof tmpdir, "%s/swdcmXXXXXX", t && *t ? t : "/tmp");
    cr_assert_not_null(mkdtemp(tmpdir), "mkdtemp: %s", strerror(errno));
}

static void teardown(void)
{
    if (tmpdir[0])
        nftw(tmpdir, rm_entry, 16, FTW_DEPTH | FTW_PHYS);
    while (npaths > 0)
        free(paths[--npaths]);
    dcm_shutdown();
}

/* A path in the test's folder; the string lives until teardown. */

static const char *tpath(const char *name)
{
    char *b = malloc(strlen(tmpdir) + strlen(name) + 2);
    cr_assert_not_null(b);
    sprintf(b, "%s/%s", tmpdir, name);
    cr_assert_lt(npaths, 1024);
    paths[npaths++] = b;
    return b;
}

/* Runs argv (PATH lookup), stdout and stderr into out; returns the exit status, 127 when the
 * program could not be started. */
static int run(const char *const argv[], char *out, size_t outn)
{
    int fds[2];
    if (pipe(fds) != 0)
        return -1;
    pid_t pid = fork();
    if (pid < 0)
        return -1;
    if (pid == 0) {
        dup2(fds[1], 1);
        dup2(fds[1], 2);
        close(fds[0]);
        close(fds[1]);
        execvp(argv[0], (char *const *)argv);
        _exit(127);
    }
    close(fds[1]);
    size_t k = 0;
    char tmp[4096];
    ssize_t r;
    while ((r = read(fds[0], tmp, sizeof tmp)) > 0 || (r < 0 && errno == EINTR)) {
        for (ssize_t i = 0; i < r && out && k + 1 < outn; i++)
            out[k++] = tmp[i];
    }
    if (out && outn)
        out[k] = '\0';
    close(fds[0]);
    int st;
    while (waitpid(pid, &st, 0) < 0 && errno == EINTR)
        ;
    return WIFEXITED(st) ? WEXITSTATUS(st) : -1;
}

static void run_ok(const char *const argv[])
{
    static char out[16384];
    int rc = run(argv, out, sizeof out);
    cr_assert_eq(rc, 0,
                 "%s exited %d (127: not found on PATH; the tests need Debian's dcmtk, "
                 "dicom3tools, python3-pydicom, python3-gdcm):\n%s",
                 argv[0], rc, out);
}

/* A synthetic slice with known pixels and geometry, under the project's invented identity. */
static void make_image(dcm_image *im, int rows, int cols, unsigned seed)
{
    memset(im, 0, sizeof *im);
    im->rows = rows;
    im->columns = cols;
    im->pixels = malloc(sizeof(float) * (size_t)rows * (size_t)cols);
    cr_assert_not_null(im->pixels);
    for (int i = 0; i < rows * cols; i++)
        im->pixels[i] = (float)((i * 37u + seed * 101u) % 4096u);
    double ipp[3] = {-124.5, -98.25, 12.75};
    /* An oblique orientation: rows along (cos a, sin a, 0), columns along (0, 0, -1). */
    double a = 0.125;
    double iop[6] = {cos(a), sin(a), 0, 0, 0, -1};
    memcpy(im->ipp, ipp, sizeof ipp);
    memcpy(im->iop, iop, sizeof iop);
    im->pixel_spacing[0] = 0.9765625;
    im->pixel_spacing[1] = 0.9375;
    im->slice_thickness_mm = 5.0;
    im->spacing_between_slices_mm = 10.0;
    im->echo_time_ms = 20.0;
    im->repetition_time_ms = 500.0;
    im->magnetic_field_t = 1.5;
    im->imaging_frequency_mhz = 63.86;
    im->flip_angle_deg = 90.0;
    im->pixel_bandwidth_hz = 130.0;
    im->echo_number = 1;
    im->series_number = 3;
    im->instance_number = 7;
    im->acquisition_number = 1;
    im->rescale_slope = 1.0;
    im->rescale_intercept = 0.0;
    strcpy(im->station_name, "ALDMR1");
    strcpy(im->manufacturer, "Slicewarden Simulator");
    strcpy(im->model, "SW-SIM 1.5T");
    strcpy(im->device_serial, "SWS-0001");
    strcpy(im->institution, "Alderbrook Regional Hospital");
    strcpy(im->series_description, "ACR T1 slice thickness");
    strcpy(im->protocol_name, "ACR T1");
    strcpy(im->patient_name, "PHANTOM^ACR LARGE");
    strcpy(im->patient_id, "ALD-QA-0001");
    strcpy(im->study_date, "20240105");
    strcpy(im->study_time, "101500");
    strcpy(im->series_date, "20240105");
    strcpy(im->series_time, "101700");
    strcpy(im->acquisition_date, "20240105");
    strcpy(im->acquisition_time, "101730");
    strcpy(im->content_date, "20240105");
    strcpy(im->content_time, "101800");
    strcpy(im->mr_acquisition_type, "2D");
    strcpy(im->receive_coil, "HEAD");
    dcm_new_uid(im->study_instance_uid, NULL);
    dcm_new_uid(im->series_instance_uid, NULL);
    dcm_new_uid(im->frame_of_reference_uid, NULL);
    dcm_new_uid(im->sop_instance_uid, NULL);
}

/* The stored value the writer promises: round to nearest, clamp to 0..4095 (BitsStored 12). */
static float stored12(float v)
{
    double s = nearbyint(v);
    return (float)(s < 0 ? 0 : s > 4095 ? 4095 : s);
}

static dcm_file *read_ok(const char *path, int header_only)
{
    dcm_read_opts o = {header_only};
    dcm_file *f = NULL;
    sw_error e;
    sw_error_clear(&e);
    sw_status st = dcm_read_file(path, &o, &f, &e);
    cr_assert_eq(st, SW_OK, "read %s: %s", path, e.msg);
    cr_assert_not_null(f);
    cr_assert_geq(f->nframes, 1);
    return f;
}

static void *slurp(const char *path, size_t *len)
{
    FILE *fp = fopen(path, "rb");
    cr_assert_not_null(fp, "open %s", path);
    fseek(fp, 0, SEEK_END);
    long n = ftell(fp);
    fseek(fp, 0, SEEK_SET);
    void *b = malloc(n > 0 ? (size_t)n : 1);
    cr_assert_not_null(b);
    cr_assert_eq(fread(b, 1, (size_t)n, fp), (size_t)n);
    fclose(fp);
    *len = (size_t)n;
    return b;
}

static void spit(const char *path, const void *b, size_t n)
{
    FILE *fp = fopen(path, "wb");
    cr_assert_not_null(fp);
    cr_assert_eq(fwrite(b, 1, n, fp), n);
    fclose(fp);
}

static void assert_same_geometry(const dcm_image *a, const dcm_image *b, double tol)
{
    for (int i = 0; i < 3; i++)
        cr_assert_float_eq(a->ipp[i], b->ipp[i], tol, "ipp[%d] %.17g vs %.17g", i, a->ipp[i],
                           b->ipp[i]);
    for (int i = 0; i < 6; i++)
        cr_assert_float_eq(a->iop[i], b->iop[i], tol, "iop[%d] %.17g vs %.17g", i, a->iop[i],
                           b->iop[i]);
    for (int i = 0; i < 2; i++)
        cr_assert_float_eq(a->pixel_spacing[i], b->pixel_spacing[i], tol, "spacing[%d]", i);
}

static void assert_same_pixels(const dcm_image *a, const dcm_image *b, const char *what)
{
    cr_assert_eq(a->rows, b->rows, "%s: rows", what);
    cr_assert_eq(a->columns, b->columns, "%s: columns", what);
    cr_assert_not_null(a->pixels);
    cr_assert_not_null(b->pixels);
    if (memcmp(a->pixels, b->pixels, sizeof(float) * (size_t)a->rows * (size_t)a->columns) == 0)
        return; /* identical bits; the loop below names the first difference otherwise */
    for (int k = 0; k < a->rows * a->columns; k++)
        cr_assert_eq(a->pixels[k], b->pixels[k], "%s: pixel %d: %g vs %g", what, k, a->pixels[k],
                     b->pixels[k]);
}

/* The message contract: "dicom: <path>: <reason>", one line. */
static void assert_message(const sw_error *e, const char *path)
{
    char prefix[1024];
    snprintf(prefix, sizeof prefix, "dicom: %s: ", path);
    cr_assert_eq(strncmp(e->msg, prefix, strlen(prefix)), 0, "message '%s' does not start '%s'",
                 e->msg, prefix);
    cr_assert_gt(strlen(e->msg), strlen(prefix), "empty reason in '%s'", e->msg);
    cr_assert_null(strchr(e->msg, '\n'), "message has a newline: '%s'", e->msg);
}

TestSuite(dicom, .init = setup, .fini = teardown);

/* ---- UIDs ------------------------------------------------------------------------------ */

/* PS3.5 9.1: components of digits separated by '.', no leading zero in a multi-digit
 * component, at most 64 characters; PS3.5 B.2: "2.25." then the UUID as an unsigned decimal;
 * RFC 4122 4.4: version 4 in the top nibble of octet 6, variant bits 10 in octet 8. */
Test(dicom, uid_2_25_scheme)
{
    enum { N = 2000 };
    static char uids[N][DCM_UID_MAX];
    for (int i = 0; i < N; i++) {
        char *u = uids[i];
        dcm_new_uid(u, "ignored");
        size_t len = strlen(u);
        cr_assert_leq(len, 64, "%s", u);
        cr_assert_eq(strncmp(u, "2.25.", 5), 0, "%s", u);
        cr_assert(u[5] >= '1' && u[5] <= '9', "leading zero or empty suffix: %s", u);
        unsigned __int128 v = 0, prev;
        for (const char *p = u + 5; *p; p++) {
            cr_assert(*p >= '0' && *p <= '9', "non-digit in %s", u);
            prev = v;
            v = v * 10 + (unsigned)(*p - '0');
            cr_assert(v >= prev, "suffix exceeds 128 bits: %s", u);
        }
        unsigned version = (unsigned)(v >> 76) & 0xF;
        unsigned variant = (unsigned)(v >> 62) & 0x3;
        cr_assert_eq(version, 4, "not a version 4 UUID: %s", u);
        cr_assert_eq(variant, 2, "not an RFC 4122 variant: %s", u);
    }
    for (int i = 0; i < N; i++)
        for (int j = i + 1; j < N; j++)
            cr_assert_str_neq(uids[i], uids[j], "duplicate UID %s", uids[i]);
}

/* ---- argument and input errors --------------------------------------------------------- */

Test(dicom, refuses_before_init)
{
    dcm_shutdown(); /* the fixture initialised; undo it */
    dcm_file *f = (dcm_file *)1;
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(dcm_read_file("x.dcm", NULL, &f, &e), SW_EINVAL);
    cr_assert_null(f);
    cr_assert_str_eq(e.msg, "dicom: x.dcm: dcm_init has not been called");
    sw_error_clear(&e);
    cr_assert_eq(dcm_init(&e), SW_OK);
    cr_assert_eq(dcm_init(&e), SW_OK, "second dcm_init must be harmless");
}

Test(dicom, bad_inputs_named)
{
    sw_error e;
    dcm_file *f = NULL;
    struct {
        const char *name;
        const char *content; /* NULL: do not create */
        int is_dir;
        sw_status want;
        const char *reason;
    } cases[] = {
        {"missing.dcm", NULL, 0, SW_EIO, "No such file or directory"},
        {"adir", NULL, 1, SW_EIO, "not a regular file"},
        {"empty.dcm", "", 0, SW_EFORMAT, "empty file"},
        {"text.dcm", "this is a text file, not DICOM at all\n", 0, SW_EFORMAT, "not a DICOM file"},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        const char *p = tpath(cases[i].name);
        if (cases[i].is_dir)
            cr_assert_eq(mkdir(p, 0755), 0);
        else if (cases[i].content)
            spit(p, cases[i].content, strlen(cases[i].content));
        sw_error_clear(&e);
        cr_assert_eq(dcm_read_file(p, NULL, &f, &e), cases[i].want, "%s: %s", p, e.msg);
        cr_assert_null(f);
        assert_message(&e, p);
        cr_assert_not_null(strstr(e.msg, cases[i].reason), "'%s' lacks '%s'", e.msg,
                           cases[i].reason);
    }
    sw_error_clear(&e);
    cr_assert_eq(dcm_read_buffer("", 0, "buf", NULL, &f, &e), SW_EFORMAT);
    cr_assert_str_eq(e.msg, "dicom: buf: empty buffer");
    sw_error_clear(&e);
    cr_assert_eq(dcm_read_file(tpath("x"), NULL, NULL, &e), SW_EINVAL);
}

/* ---- classic MR: write, read back ------------------------------------------------------ */

static void assert_same_attributes(const dcm_image *w, const dcm_image *r)
{
    cr_assert_str_eq(r->sop_class_uid, MR_STORAGE);
    cr_assert_str_eq(r->sop_instance_uid, w->sop_instance_uid);
    cr_assert_str_eq(r->study_instance_uid, w->study_instance_uid);
    cr_assert_str_eq(r->series_instance_uid, w->series_instance_uid);
    cr_assert_str_eq(r->frame_of_reference_uid, w->frame_of_reference_uid);
    cr_assert_str_eq(r->modality, "MR");
    cr_assert_str_eq(r->station_name, w->station_name);
    cr_assert_str_eq(r->device_serial, w->device_serial);
    cr_assert_str_eq(r->manufacturer, w->manufacturer);
    cr_assert_str_eq(r->model, w->model);
    cr_assert_str_eq(r->institution, w->institution);
    cr_assert_str_eq(r->series_description, w->series_description);
    cr_assert_str_eq(r->protocol_name, w->protocol_name);
    cr_assert_str_eq(r->patient_name, w->patient_name);
    cr_assert_str_eq(r->patient_id, w->patient_id);
    cr_assert_str_eq(r->mr_acquisition_type, w->mr_acquisition_type);
    cr_assert_str_eq(r->study_date, w->study_date);
    cr_assert_str_eq(r->series_date, w->series_date);
    cr_assert_str_eq(r->acquisition_date, w->acquisition_date);
    cr_assert_str_eq(r->content_date, w->content_date);
    cr_assert_str_eq(r->study_time, w->study_time);
    cr_assert_str_eq(r->series_time, w->series_time);
    cr_assert_str_eq(r->acquisition_time, w->acquisition_time);
    cr_assert_str_eq(r->content_time, w->content_time);
    cr_assert_str_eq(r->receive_coil, w->receive_coil);
    cr_assert_eq(r->series_number, w->series_number);
    cr_assert_eq(r->instance_number, w->instance_number);
    cr_assert_eq(r->acquisition_number, w->acquisition_number);
    cr_assert_eq(r->echo_number, w->echo_number);
    cr_assert_float_eq(r->echo_time_ms, w->echo_time_ms, 1e-12);
    cr_assert_float_eq(r->repetition_time_ms, w->repetition_time_ms, 1e-12);
    cr_assert_float_eq(r->slice_thickness_mm, w->slice_thickness_mm, 1e-12);
    cr_assert_float_eq(r->spacing_between_slices_mm, w->spacing_between_slices_mm, 1e-12);
    cr_assert_float_eq(r->magnetic_field_t, w->magnetic_field_t, 1e-12);
    cr_assert_float_eq(r->imaging_frequency_mhz, w->imaging_frequency_mhz, 1e-12);
    cr_assert_float_eq(r->flip_angle_deg, w->flip_angle_deg, 1e-12);
    cr_assert_float_eq(r->pixel_bandwidth_hz, w->pixel_bandwidth_hz, 1e-12);
    cr_assert_str_eq(r->patient_position, w->patient_position[0] ? w->patient_position : "HFS");
    /* DS holds at most 16 characters (PS3.5 Table 6.2-1): -124.5 + 10 cos(0.125) keeps 14
     * significant digits, so 1e-10 mm is the round trip's resolution. */
    assert_same_geometry(w, r, 1e-10);
    cr_assert_eq(r->has_geometry, 1);
    cr_assert_eq(r->rows, w->rows);
    cr_assert_eq(r->columns, w->columns);
    cr_assert_eq(r->frame, 0);
    cr_assert_eq(r->frame_count, 1);
    cr_assert_eq(r->bits_stored, 12);
    cr_assert_eq(r->bits_allocated, 16);
    cr_assert_eq(r->high_bit, 11);
    cr_assert_eq(r->pixel_representation, 0);
    cr_assert_str_eq(r->photometric, "MONOCHROME2");
    cr_assert_float_eq(r->rescale_slope, 1.0, 0);
    cr_assert_float_eq(r->rescale_intercept, 0.0, 0);
}

Test(dicom, classic_roundtrip)
{
    dcm_image w;
    make_image(&w, 64, 48, 1);
    /* Values the 12-bit rounding must handle: fractions, halves, out of range. */
    const float special[] = {-7.0f, -0.4f,   0.49f,   0.5f,    1.5f,
                             2.5f,  4094.6f, 4095.4f, 5000.0f, 1e9f};
    for (size_t i = 0; i < sizeof special / sizeof special[0]; i++)
        w.pixels[i * 11] = special[i];
    sw_error e;
    sw_error_clear(&e);
    strcpy(w.patient_position, "FFS");
    const char *p = tpath("classic.dcm");
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_OK, "%s", e.msg);

    dcm_file *f = read_ok(p, 0);
    cr_assert_eq(f->nframes, 1);
    dcm_image *r = &f->frames[0];
    assert_same_attributes(&w, r);
    cr_assert_str_eq(r->transfer_syntax_uid, TS_EXPLICIT_LE);
    for (int k = 0; k < w.rows * w.columns; k++)
        cr_assert_eq(r->pixels[k], stored12(w.pixels[k]), "pixel %d: wrote %g, read %g", k,
                     w.pixels[k], r->pixels[k]);
    /* nearbyint rounds halves to even (C11 7.12.9.3 under the default rounding mode). */
    cr_assert_eq(r->pixels[0], 0.0f);
    cr_assert_eq(r->pixels[3 * 11], 0.0f);
    cr_assert_eq(r->pixels[4 * 11], 2.0f);
    cr_assert_eq(r->pixels[5 * 11], 2.0f);
    cr_assert_eq(r->pixels[7 * 11], 4095.0f);
    cr_assert_eq(r->pixels[9 * 11], 4095.0f);

    /* Header only: the same attributes, no pixels. */
    dcm_file *h = read_ok(p, 1);
    assert_same_attributes(&w, &h->frames[0]);
    cr_assert_null(h->frames[0].pixels);

    /* From a buffer: the same as from the file. */
    size_t len;
    void *buf = slurp(p, &len);
    dcm_file *b = NULL;
    sw_error_clear(&e);
    cr_assert_eq(dcm_read_buffer(buf, len, "mem", NULL, &b, &e), SW_OK, "%s", e.msg);
    assert_same_attributes(&w, &b->frames[0]);
    assert_same_pixels(r, &b->frames[0], "buffer");

    /* The file is complete once written: no temporary left beside it. */
    DIR *d = opendir(tmpdir);
    struct dirent *de;
    int n = 0;
    while ((de = readdir(d)))
        if (de->d_name[0] != '.' || (strcmp(de->d_name, ".") && strcmp(de->d_name, "..")))
            n++;
    closedir(d);
    cr_assert_eq(n, 1, "expected only classic.dcm in the folder, found %d entries", n);

    free(buf);
    dcm_file_free(b);
    dcm_file_free(h);
    dcm_file_free(f);
    free(w.pixels);
}

/* The file meta header names us (PS3.10 7.1), as DCMTK's dcmdump reads it. */
Test(dicom, file_meta_header)
{
    dcm_image w;
    make_image(&w, 16, 16, 2);
    sw_error e;
    sw_error_clear(&e);
    const char *p = tpath("meta.dcm");
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_OK, "%s", e.msg);
    char out[8192];
    const char *argv[] = {"dcmdump", p, NULL};
    cr_assert_eq(run(argv, out, sizeof out), 0, "%s", out);
    char want[256];
    snprintf(want, sizeof want, "[%s]", w.sop_instance_uid);
    cr_assert_not_null(strstr(out, want), "MediaStorageSOPInstanceUID missing:\n%s", out);
    cr_assert_not_null(strstr(out, "=MRImageStorage"), "%s", out);
    cr_assert_not_null(strstr(out, "=LittleEndianExplicit"), "%s", out);
    cr_assert_not_null(strstr(out, "ImplementationClassUID"), "%s", out);
    cr_assert_not_null(strstr(out, "[2.25."), "ImplementationClassUID not ours:\n%s", out);
    cr_assert_not_null(strstr(out, "[SLICEWARDEN01]"), "%s", out);
    /* PS3.10 7.1: 128-byte preamble, "DICM", then (0002,0000) UL whose value counts the bytes of
     * the rest of group 2; the data set (group 8 here) starts right after them. */
    size_t len;
    unsigned char *b = slurp(p, &len);
    cr_assert_gt(len, 144);
    cr_assert_eq(memcmp(b + 128, "DICM", 4), 0);
    cr_assert_eq(memcmp(b + 132, "\x02\x00\x00\x00UL\x04\x00", 8), 0);
    uint32_t gl =
        (uint32_t)b[140] | (uint32_t)b[141] << 8 | (uint32_t)b[142] << 16 | (uint32_t)b[143] << 24;
    size_t next = 144 + (size_t)gl;
    cr_assert_lt(next + 2, len);
    cr_assert_eq(b[next] | b[next + 1] << 8, 0x0008, "group length %u does not end group 2", gl);
    free(b);
    free(w.pixels);
}

Test(dicom, writer_refuses_bad_input)
{
    sw_error e;
    dcm_image w;
    make_image(&w, 8, 8, 3);
    const char *p = tpath("bad.dcm");
    w.iop[3] = 1; /* column direction no longer orthogonal to the row direction */
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_EINVAL);
    assert_message(&e, p);
    cr_assert_not_null(strstr(e.msg, "ImageOrientationPatient"), "%s", e.msg);
    w.iop[3] = 0;

    w.pixels[5] = NAN;
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_EINVAL);
    cr_assert_not_null(strstr(e.msg, "pixel 5"), "%s", e.msg);
    w.pixels[5] = 1;

    strcpy(w.sop_instance_uid, "1.2.03.4"); /* leading zero in a component: PS3.5 9.1 */
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_EINVAL);
    cr_assert_not_null(strstr(e.msg, "SOPInstanceUID"), "%s", e.msg);
    dcm_new_uid(w.sop_instance_uid, NULL);

    strcpy(w.station_name, "A-STATION-NAME-LONGER-THAN-16"); /* SH: 16 characters, PS3.5 6.2 */
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_EINVAL);
    cr_assert_not_null(strstr(e.msg, "StationName"), "%s", e.msg);
    strcpy(w.station_name, "ALDMR1");

    w.pixel_spacing[1] = 0;
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_EINVAL);
    w.pixel_spacing[1] = 1;

    /* Nothing half-written stays behind, and a missing folder is an I/O error. */
    cr_assert_eq(access(p, F_OK), -1);
    const char *q = tpath("no/such/dir/x.dcm");
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_mr(q, &w, &e), SW_EIO);
    assert_message(&e, q);
    free(w.pixels);
}

/* Non-ASCII text is written as UTF-8 (ISO_IR 192, PS3.3 C.12.1.1.2) and read back. */
Test(dicom, utf8_text)
{
    dcm_image w;
    make_image(&w, 8, 8, 4);
    strcpy(w.series_description, "ACR T1 \xc3\xa9paisseur de coupe"); /* "épaisseur" */
    sw_error e;
    sw_error_clear(&e);
    const char *p = tpath("utf8.dcm");
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_OK, "%s", e.msg);
    dcm_file *f = read_ok(p, 1);
    cr_assert_str_eq(f->frames[0].series_description, w.series_description);
    char out[8192];
    const char *argv[] = {"dcmdump", "+P", "0008,0005", p, NULL};
    cr_assert_eq(run(argv, out, sizeof out), 0, "%s", out);
    cr_assert_not_null(strstr(out, "ISO_IR 192"), "%s", out);
    dcm_file_free(f);
    free(w.pixels);
}

/* ---- DCMTK's converters: every transfer syntax reads back the same ----------------------- */

struct conv {
    const char *name;
    const char *argv0, *arg1, *arg2; /* tool and options; input and output appended */
    const char *ts;                  /* expected TransferSyntaxUID, "" for a raw dataset */
};

static const struct conv lossless[] = {
    {"implicit", "dcmconv", "+ti", NULL, TS_IMPLICIT_LE},
    {"bigendian", "dcmconv", "+tb", NULL, TS_EXPLICIT_BE},
    {"deflated", "dcmconv", "+td", NULL, TS_DEFLATED},
    {"jpeg_sv1", "dcmcjpeg", "+e1", NULL, TS_JPEG_LOSSLESS_SV1},
    {"jpeg_lossless", "dcmcjpeg", "+el", NULL, TS_JPEG_LOSSLESS},
    {"jpegls", "dcmcjpls", "+el", NULL, TS_JPEGLS_LOSSLESS},
    {"rle", "dcmcrle", NULL, NULL, TS_RLE},
    /* No file meta header: a bare dataset, implicit and explicit VR. */
    {"raw_implicit", "dcmconv", "-F", "+ti", ""},
    {"raw_explicit", "dcmconv", "-F", "+te", ""},
};

static void convert(const struct conv *c, const char *in, const char *out)
{
    const char *argv[8];
    int k = 0;
    argv[k++] = c->argv0;
    if (c->arg1)
        argv[k++] = c->arg1;
    if (c->arg2)
        argv[k++] = c->arg2;
    argv[k++] = in;
    argv[k++] = out;
    argv[k] = NULL;
    run_ok(argv);
}

Test(dicom, dcmtk_conversions_read_identically)
{
    dcm_image w;
    make_image(&w, 40, 56, 5);
    sw_error e;
    sw_error_clear(&e);
    const char *src = tpath("src.dcm");
    cr_assert_eq(dcm_write_mr(src, &w, &e), SW_OK, "%s", e.msg);
    dcm_file *ref = read_ok(src, 0);
    for (size_t i = 0; i < sizeof lossless / sizeof lossless[0]; i++) {
        const struct conv *c = &lossless[i];
        char name[64];
        snprintf(name, sizeof name, "%s.dcm", c->name);
        const char *out = tpath(name);
        convert(c, src, out);
        dcm_file *f = read_ok(out, 0);
        cr_assert_eq(f->nframes, 1, "%s", c->name);
        dcm_image *r = &f->frames[0];
        if (c->ts[0])
            cr_assert_str_eq(r->transfer_syntax_uid, c->ts, "%s", c->name);
        else /* detected: implicit or explicit little endian */
            cr_assert(strcmp(r->transfer_syntax_uid, TS_IMPLICIT_LE) == 0 ||
                          strcmp(r->transfer_syntax_uid, TS_EXPLICIT_LE) == 0,
                      "%s: %s", c->name, r->transfer_syntax_uid);
        cr_assert_str_eq(r->sop_instance_uid, w.sop_instance_uid, "%s", c->name);
        cr_assert_str_eq(r->series_instance_uid, w.series_instance_uid, "%s", c->name);
        cr_assert_str_eq(r->station_name, "ALDMR1", "%s", c->name);
        cr_assert_eq(r->echo_number, 1, "%s", c->name);
        assert_same_geometry(&ref->frames[0], r, 0);
        assert_same_pixels(&ref->frames[0], r, c->name);
        dcm_file *h = read_ok(out, 1);
        cr_assert_null(h->frames[0].pixels);
        cr_assert_str_eq(h->frames[0].sop_instance_uid, w.sop_instance_uid);
        dcm_file_free(h);
        dcm_file_free(f);
    }
    dcm_file_free(ref);
    free(w.pixels);
}

/* Lossy JPEG (baseline, extended, and the retired spectral selection and progressive processes)
 * and near-lossless JPEG-LS: our decoding equals what DCMTK's own decompressors (dcmdjpeg,
 * dcmdjpls) write out. */
Test(dicom, lossy_matches_dcmtk_decompressors)
{
    dcm_image w;
    make_image(&w, 32, 32, 6);
    sw_error e;
    sw_error_clear(&e);
    const char *src = tpath("src.dcm");
    cr_assert_eq(dcm_write_mr(src, &w, &e), SW_OK, "%s", e.msg);
    struct {
        const char *name, *enc, *opt, *dec, *ts;
        int near_original; /* 0: the encoder rescales (baseline JPEG is 8 bit) */
    } cases[] = {
        {"jpeg_baseline", "dcmcjpeg", "+eb", "dcmdjpeg", TS_JPEG_BASELINE, 0},
        {"jpeg_ext", "dcmcjpeg", "+ee", "dcmdjpeg", TS_JPEG_EXTENDED, 1},
        {"jpeg_spectral", "dcmcjpeg", "+es", "dcmdjpeg", TS_JPEG_SPECTRAL, 1},
        {"jpeg_progressive", "dcmcjpeg", "+ep", "dcmdjpeg", TS_JPEG_PROGRESSIVE, 1},
        {"jpegls_near", "dcmcjpls", "+en", "dcmdjpls", TS_JPEGLS_NEAR, 1},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        char a[64], b[64];
        snprintf(a, sizeof a, "%s.dcm", cases[i].name);
        snprintf(b, sizeof b, "%s_dec.dcm", cases[i].name);
        const char *enc[] = {cases[i].enc, cases[i].opt, src, tpath(a), NULL};
        run_ok(enc);
        const char *dec[] = {cases[i].dec, tpath(a), tpath(b), NULL};
        run_ok(dec);
        dcm_file *fa = read_ok(tpath(a), 0), *fb = read_ok(tpath(b), 0);
        cr_assert_str_eq(fa->frames[0].transfer_syntax_uid, cases[i].ts);
        assert_same_pixels(&fa->frames[0], &fb->frames[0], cases[i].name);
        if (!cases[i].near_original) {
            dcm_file_free(fa);
            dcm_file_free(fb);
            continue;
        }
        /* Lossy, yet close to the original (a gross decoding fault would not be). */
        double sum = 0;
        for (int k = 0; k < w.rows * w.columns; k++)
            sum += fabs(fa->frames[0].pixels[k] - stored12(w.pixels[k]));
        cr_assert_lt(sum / (w.rows * w.columns), 200.0, "%s: mean error %g", cases[i].name,
                     sum / (w.rows * w.columns));
        dcm_file_free(fa);
        dcm_file_free(fb);
    }
    free(w.pixels);
}

/* ---- stored value rules (PS3.5 8.1.1, PS3.3 C.7.6.3.1.4 and C.11.1.1.2) ---------------- */

Test(dicom, bits_stored_masking_sign_and_rescale)
{
    dcm_image w;
    make_image(&w, 16, 16, 7);
    sw_error e;
    sw_error_clear(&e);
    const char *src = tpath("src.dcm");
    cr_assert_eq(dcm_write_mr(src, &w, &e), SW_OK, "%s", e.msg);
    dcm_file *ref = read_ok(src, 0);
    const float *v = ref->frames[0].pixels;
    struct {
        const char *name;
        const char *mods[4];
    } cases[] = {
        /* 8 bits stored at bits 0..7: the value is the low byte. */
        {"mask8", {"(0028,0101)=8", "(0028,0102)=7", NULL}},
        /* 8 bits stored at bits 4..11 (HighBit 11): the value is bits 4..11. */
        {"shift8", {"(0028,0101)=8", "(0028,0102)=11", NULL}},
        /* Signed 12 bit: two's complement in 12 bits. */
        {"signed12", {"(0028,0103)=1", NULL}},
        /* Rescale with a fractional intercept (DicomImage's getInterData would round it). */
        {"rescale", {"(0028,1053)=1.25", "(0028,1052)=-10.5", NULL}},
        {"mono1", {"(0028,0004)=MONOCHROME1", NULL}},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        char name[64];
        snprintf(name, sizeof name, "%s.dcm", cases[i].name);
        const char *out = tpath(name);
        size_t len;
        void *b = slurp(src, &len);
        spit(out, b, len);
        free(b);
        for (int m = 0; cases[i].mods[m]; m++) {
            const char *argv[] = {"dcmodify", "-nb", "-i", cases[i].mods[m], out, NULL};
            run_ok(argv);
        }
        dcm_file *f = read_ok(out, 0);
        const dcm_image *r = &f->frames[0];
        for (int k = 0; k < r->rows * r->columns; k++) {
            unsigned s = (unsigned)v[k];
            double want;
            switch (i) {
            case 0: want = s & 0xFFu; break;
            case 1: want = (s >> 4) & 0xFFu; break;
            case 2: want = s >= 2048 ? (double)s - 4096 : s; break;
            case 3: want = s * 1.25 - 10.5; break;
            default: want = s; break;
            }
            cr_assert_eq(r->pixels[k], (float)want, "%s pixel %d: stored %u, read %g, want %g",
                         cases[i].name, k, s, r->pixels[k], want);
        }
        if (i == 4)
            cr_assert_str_eq(r->photometric, "MONOCHROME1");
        if (i == 3) {
            cr_assert_float_eq(r->rescale_slope, 1.25, 0);
            cr_assert_float_eq(r->rescale_intercept, -10.5, 0);
        }
        dcm_file_free(f);
    }
    dcm_file_free(ref);
    free(w.pixels);
}

/* ---- Enhanced MR multi-frame ----------------------------------------------------------- */

#define NF 6

/* Three positions along the normal, two echoes, a different rescale per frame; every pixel is a
 * stored value times slope plus intercept, so the round trip is exact. */
static void make_frames(dcm_image *fr, int oblique_per_frame)
{
    for (int i = 0; i < NF; i++) {
        dcm_image *im = &fr[i];
        make_image(im, 24, 20, (unsigned)i + 10);
        if (i > 0) {
            strcpy(im->study_instance_uid, fr[0].study_instance_uid);
            strcpy(im->series_instance_uid, fr[0].series_instance_uid);
            strcpy(im->frame_of_reference_uid, fr[0].frame_of_reference_uid);
            strcpy(im->sop_instance_uid, fr[0].sop_instance_uid);
        }
        int pos = i % 3, echo = i / 3 + 1;
        double nrm[3] = {im->iop[1] * im->iop[5] - im->iop[2] * im->iop[4],
                         im->iop[2] * im->iop[3] - im->iop[0] * im->iop[5],
                         im->iop[0] * im->iop[4] - im->iop[1] * im->iop[3]};
        for (int k = 0; k < 3; k++)
            im->ipp[k] += 10.0 * pos * nrm[k];
        if (oblique_per_frame && i == NF - 1) {
            /* one frame rotated in plane: forces per-frame orientation */
            double c = cos(0.5), s = sin(0.5);
            double iop[6] = {c, s, 0, -s, c, 0};
            memcpy(im->iop, iop, sizeof iop);
        }
        im->echo_number = echo;
        im->echo_time_ms = echo == 1 ? 20.0 : 80.0;
        im->rescale_slope = 0.5 + 0.25 * i;
        im->rescale_intercept = -10.0 + 3.5 * i;
        for (int k = 0; k < im->rows * im->columns; k++) {
            unsigned s = (unsigned)((k * 53 + i * 977) % 4096);
            im->pixels[k] = (float)(s * im->rescale_slope + im->rescale_intercept);
        }
    }
}

static void assert_frames(const dcm_file *f, const dcm_image *fr, int with_pixels)
{
    cr_assert_eq(f->nframes, NF);
    for (int i = 0; i < NF; i++) {
        const dcm_image *r = &f->frames[i], *w = &fr[i];
        cr_assert_str_eq(r->sop_class_uid, ENHANCED_MR_STORAGE);
        cr_assert_str_eq(r->sop_instance_uid, fr[0].sop_instance_uid);
        cr_assert_str_eq(r->series_instance_uid, fr[0].series_instance_uid);
        cr_assert_eq(r->frame, i + 1);
        cr_assert_eq(r->frame_count, NF);
        assert_same_geometry(w, r, 1e-10); /* DS: 16 characters */
        cr_assert_eq(r->has_geometry, 1);
        cr_assert_float_eq(r->slice_thickness_mm, 5.0, 0);
        cr_assert_eq(r->echo_number, w->echo_number, "frame %d echo %d", i + 1, r->echo_number);
        cr_assert_float_eq(r->echo_time_ms, w->echo_time_ms, 0);
        cr_assert_float_eq(r->repetition_time_ms, 500.0, 0);
        cr_assert_float_eq(r->flip_angle_deg, 90.0, 0);
        cr_assert_float_eq(r->magnetic_field_t, 1.5, 0);
        cr_assert_float_eq(r->imaging_frequency_mhz, 63.86, 1e-12);
        cr_assert_float_eq(r->pixel_bandwidth_hz, 130.0, 0);
        cr_assert_float_eq(r->rescale_slope, w->rescale_slope, 0);
        cr_assert_float_eq(r->rescale_intercept, w->rescale_intercept, 0);
        cr_assert_eq(r->in_stack_position, i % 3 + 1, "frame %d in-stack %d", i + 1,
                     r->in_stack_position);
        cr_assert_str_eq(r->stack_id, "1");
        cr_assert_str_eq(r->station_name, "ALDMR1");
        cr_assert_str_eq(r->receive_coil, "HEAD");
        if (with_pixels)
            for (int k = 0; k < r->rows * r->columns; k++)
                cr_assert_eq(r->pixels[k], w->pixels[k], "frame %d pixel %d: %g vs %g", i + 1, k,
                             r->pixels[k], w->pixels[k]);
        else
            cr_assert_null(r->pixels);
    }
}

Test(dicom, enhanced_roundtrip)
{
    for (int oblique = 0; oblique <= 1; oblique++) {
        dcm_image fr[NF];
        make_frames(fr, oblique);
        sw_error e;
        sw_error_clear(&e);
        const char *p = tpath(oblique ? "enh_oblique.dcm" : "enh.dcm");
        cr_assert_eq(dcm_write_enhanced_mr(p, fr, NF, &e), SW_OK, "%s", e.msg);
        dcm_file *f = read_ok(p, 0);
        assert_frames(f, fr, 1);
        dcm_file_free(f);
        f = read_ok(p, 1);
        assert_frames(f, fr, 0);
        dcm_file_free(f);

        /* Multi-frame through DCMTK's JPEG-LS and RLE codecs. */
        const char *ls[] = {"dcmcjpls", p, tpath("enh_ls.dcm"), NULL};
        run_ok(ls);
        f = read_ok(tpath("enh_ls.dcm"), 0);
        cr_assert_str_eq(f->frames[0].transfer_syntax_uid, TS_JPEGLS_LOSSLESS);
        assert_frames(f, fr, 1);
        dcm_file_free(f);
        const char *rle[] = {"dcmcrle", p, tpath("enh_rle.dcm"), NULL};
        run_ok(rle);
        f = read_ok(tpath("enh_rle.dcm"), 0);
        assert_frames(f, fr, 1);
        dcm_file_free(f);

        /* Without the dimension index, echoes are numbered by echo time (shortest first). */
        const char *strip[] = {"dcmodify", "-nb", "-ea", "(0020,9222)", p, NULL};
        run_ok(strip);
        f = read_ok(p, 0);
        assert_frames(f, fr, 1);
        dcm_file_free(f);
        for (int i = 0; i < NF; i++)
            free(fr[i].pixels);
    }
}

Test(dicom, enhanced_refuses_mixed_sizes)
{
    dcm_image fr[2];
    make_image(&fr[0], 8, 8, 1);
    make_image(&fr[1], 8, 9, 2);
    sw_error e;
    sw_error_clear(&e);
    const char *p = tpath("mixed.dcm");
    cr_assert_eq(dcm_write_enhanced_mr(p, fr, 2, &e), SW_EINVAL);
    assert_message(&e, p);
    cr_assert_eq(access(p, F_OK), -1);
    /* Type 1 numbers of the acquisition are not made up (PixelBandwidth: PS3.3 MR Imaging
     * Modifier macro, C.8.13.5.6 from memory; RepetitionTime: MR Timing macro). */
    free(fr[1].pixels);
    make_image(&fr[1], 8, 8, 2);
    strcpy(fr[1].sop_instance_uid, fr[0].sop_instance_uid);
    fr[0].pixel_bandwidth_hz = fr[1].pixel_bandwidth_hz = 0;
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_enhanced_mr(p, fr, 2, &e), SW_EINVAL);
    cr_assert_not_null(strstr(e.msg, "PixelBandwidth"), "%s", e.msg);
    fr[0].pixel_bandwidth_hz = fr[1].pixel_bandwidth_hz = 130;
    fr[0].repetition_time_ms = NAN;
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_enhanced_mr(p, fr, 2, &e), SW_EINVAL);
    cr_assert_not_null(strstr(e.msg, "RepetitionTime"), "%s", e.msg);
    cr_assert_eq(access(p, F_OK), -1);
    free(fr[0].pixels);
    free(fr[1].pixels);
}

/* ---- dciodvfy (dicom3tools) ------------------------------------------------------------ */

/* dciodvfy prints "Error - ..." for every violation of the IOD it recognises (and the IOD's name
 * first); warnings are not errors. */
static void assert_dciodvfy_clean(const char *path, const char *iod)
{
    static char out[65536];
    const char *argv[] = {"dciodvfy", path, NULL};
    int rc = run(argv, out, sizeof out);
    cr_assert_neq(rc, 127, "dciodvfy not found on PATH (package dicom3tools)");
    cr_assert_not_null(strstr(out, iod), "dciodvfy did not recognise %s:\n%s", iod, out);
    for (const char *l = out; l && *l; l = strchr(l, '\n') ? strchr(l, '\n') + 1 : NULL)
        cr_assert_neq(strncmp(l, "Error", 5), 0, "dciodvfy on %s:\n%s", path, out);
}

Test(dicom, dciodvfy_classic_and_enhanced)
{
    dcm_image w;
    make_image(&w, 32, 32, 8);
    sw_error e;
    sw_error_clear(&e);
    const char *p = tpath("v_classic.dcm");
    cr_assert_eq(dcm_write_mr(p, &w, &e), SW_OK, "%s", e.msg);
    assert_dciodvfy_clean(p, "MRImage");
    /* The minimum: only what the writer must default. */
    dcm_image m = w;
    m.manufacturer[0] = m.station_name[0] = m.institution[0] = m.patient_name[0] = 0;
    m.study_date[0] = m.study_time[0] = m.content_date[0] = m.content_time[0] = 0;
    m.sop_instance_uid[0] = m.series_instance_uid[0] = m.study_instance_uid[0] = 0;
    m.frame_of_reference_uid[0] = 0;
    m.echo_time_ms = m.repetition_time_ms = m.slice_thickness_mm = NAN;
    m.series_number = m.instance_number = 0;
    const char *q = tpath("v_minimal.dcm");
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_mr(q, &m, &e), SW_OK, "%s", e.msg);
    assert_dciodvfy_clean(q, "MRImage");
    free(w.pixels);

    dcm_image fr[NF];
    make_frames(fr, 0);
    const char *r = tpath("v_enhanced.dcm");
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_enhanced_mr(r, fr, NF, &e), SW_OK, "%s", e.msg);
    assert_dciodvfy_clean(r, "EnhancedMRImage");
    for (int i = 0; i < NF; i++)
        free(fr[i].pixels);
}

/* ---- pydicom's reading against ours ---------------------------------------------------- */

static json_t *nums(const double *v, int n)
{
    json_t *a = json_array();
    for (int i = 0; i < n; i++)
        json_array_append_new(a, isfinite(v[i]) ? json_real(v[i]) : json_null());
    return a;
}

static json_t *num(double v)
{
    return isfinite(v) ? json_real(v) : json_null();
}

/* One manifest entry: what our reader says about path, pixels dumped to path.f32. */
static json_t *describe(const char *path, double pixel_tol, const char *const *text)
{
    dcm_file *f = read_ok(path, 0);
    char raw[1024];
    snprintf(raw, sizeof raw, "%s/%d.f32", tmpdir, rand());
    FILE *fp = fopen(raw, "wb");
    cr_assert_not_null(fp);
    json_t *frames = json_array();
    for (int i = 0; i < f->nframes; i++) {
        const dcm_image *im = &f->frames[i];
        size_t n = (size_t)im->rows * (size_t)im->columns;
        cr_assert_eq(fwrite(im->pixels, sizeof(float), n, fp), n);
        json_t *o = json_pack(
            "{s:s, s:s, s:s, s:s, s:s, s:s, s:s, s:i, s:i, s:i, s:o, s:o, s:o, s:o, s:o, s:f, "
            "s:f, s:s, s:s, s:s, s:s}",
            "sop_class_uid", im->sop_class_uid, "sop_instance_uid", im->sop_instance_uid,
            "study_instance_uid", im->study_instance_uid, "series_instance_uid",
            im->series_instance_uid, "frame_of_reference_uid", im->frame_of_reference_uid,
            "modality", im->modality, "transfer_syntax_uid", im->transfer_syntax_uid, "rows",
            im->rows, "columns", im->columns, "echo_number", im->echo_number, "ipp",
            nums(im->ipp, 3), "iop", nums(im->iop, 6), "pixel_spacing", nums(im->pixel_spacing, 2),
            "slice_thickness_mm", num(im->slice_thickness_mm), "echo_time_ms",
            num(im->echo_time_ms), "rescale_slope", im->rescale_slope, "rescale_intercept",
            im->rescale_intercept, "patient_name", im->patient_name, "institution", im->institution,
            "station_name", im->station_name, "series_description", im->series_description);
        cr_assert_not_null(o, "json_pack");
        /* An absent attribute is null rather than a list of NaN. */
        if (!isfinite(im->ipp[0]))
            json_object_set_new(o, "ipp", json_null());
        if (!isfinite(im->iop[0]))
            json_object_set_new(o, "iop", json_null());
        if (!isfinite(im->pixel_spacing[0]))
            json_object_set_new(o, "pixel_spacing", json_null());
        json_array_append_new(frames, o);
    }
    fclose(fp);
    json_t *t = json_array();
    for (int i = 0; text && text[i]; i++)
        json_array_append_new(t, json_string(text[i]));
    json_t *entry = json_pack("{s:s, s:s, s:o, s:f, s:o}", "dicom", path, "raw", raw, "frames",
                              frames, "pixel_tol", pixel_tol, "text", t);
    dcm_file_free(f);
    return entry;
}

static const char *corpus(const char *rel)
{
    cr_assert_neq(strlen(SW_PYDICOM_DATA), 0,
                  "pydicom's data folder was not found when cmake ran (python3-pydicom)");
    char *b = malloc(strlen(SW_PYDICOM_DATA) + strlen(rel) + 2);
    cr_assert_not_null(b);
    sprintf(b, "%s/%s", SW_PYDICOM_DATA, rel);
    cr_assert_lt(npaths, 1024);
    paths[npaths++] = b;
    return b;
}

Test(dicom, pydicom_agrees, .timeout = 120)
{
    cr_assert_neq(strlen(SW_PYTHON3), 0, "Debian's python3 was not found when cmake ran");
    json_t *manifest = json_array();
    sw_error e;
    static const char *const names[] = {"patient_name", "institution", "station_name",
                                        "series_description", NULL};
    /* Ours: classic, its DCMTK conversions, a signed variant, and Enhanced multi-frame. */
    dcm_image w;
    make_image(&w, 40, 36, 9);
    w.echo_number = 2;
    w.echo_time_ms = 80;
    const char *src = tpath("py_src.dcm");
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_mr(src, &w, &e), SW_OK, "%s", e.msg);
    json_array_append_new(manifest, describe(src, 0, names));
    for (size_t i = 0; i < 7; i++) { /* the converters that keep a meta header */
        char name[64];
        snprintf(name, sizeof name, "py_%s.dcm", lossless[i].name);
        convert(&lossless[i], src, tpath(name));
        json_array_append_new(manifest, describe(tpath(name), 0, names));
    }
    /* (Signed data with BitsStored < BitsAllocated is left out here: pydicom 2.3 returns the
     * 16-bit container value without sign extension; bits_stored_masking_sign_and_rescale checks
     * it against PS3.5 8.1.1 instead.) */
    dcm_image fr[NF];
    make_frames(fr, 1);
    const char *enh = tpath("py_enhanced.dcm");
    sw_error_clear(&e);
    cr_assert_eq(dcm_write_enhanced_mr(enh, fr, NF, &e), SW_OK, "%s", e.msg);
    json_array_append_new(manifest, describe(enh, 0, names));

    /* pydicom's own test files: big endian, deflated, RLE, JPEG-LS, JPEG extended (lossy, decoded
     * by gdcm on pydicom's side), 8 and 32 bit, multi-frame, and character sets. */
    static const struct {
        const char *rel;
        double tol;
        int text;
    } ext[] = {
        {"test_files/MR_small.dcm", 0, 1},
        {"test_files/MR_small_bigendian.dcm", 0, 0},
        {"test_files/MR_small_implicit.dcm", 0, 0},
        {"test_files/MR_small_RLE.dcm", 0, 0},
        {"test_files/MR_small_jpeg_ls_lossless.dcm", 0, 0},
        {"test_files/image_dfl.dcm", 0, 0},
        {"test_files/CT_small.dcm", 0, 1},
        {"test_files/JPGExtended.dcm", 0, 0},
        {"test_files/rtdose.dcm", 0, 0},
        {"test_files/rtdose_expb.dcm", 0, 0},
        {"test_files/rtdose_rle.dcm", 0, 0},
        {"test_files/dicomdirtests/77654033/CR1/6154", 0, 0},
        {"charset_files/chrFren.dcm", 0, 1},
        {"charset_files/chrGerm.dcm", 0, 1},
        {"charset_files/chrGreek.dcm", 0, 1},
        {"charset_files/chrRuss.dcm", 0, 1},
        {"charset_files/chrArab.dcm", 0, 1},
        {"charset_files/chrHbrw.dcm", 0, 1},
        {"charset_files/chrI2.dcm", 0, 1},
        {"charset_files/chrX1.dcm", 0, 1},
        {"charset_files/chrX2.dcm", 0, 1},
    };
    static const char *const pn[] = {"patient_name", "institution", "station_name", NULL};
    for (size_t i = 0; i < sizeof ext / sizeof ext[0]; i++)
        json_array_append_new(manifest,
                              describe(corpus(ext[i].rel), ext[i].tol, ext[i].text ? pn : NULL));
    /* 8-bit data re-encoded by dcmconv: implicit VR makes it OW (bytes packed in words), big
     * endian keeps OB. */
    const struct conv *eight[] = {&lossless[0], &lossless[1]};
    for (size_t i = 0; i < 2; i++) {
        char name[64];
        snprintf(name, sizeof name, "py_8bit_%s.dcm", eight[i]->name);
        convert(eight[i], corpus("test_files/image_dfl.dcm"), tpath(name));
        json_array_append_new(manifest, describe(tpath(name), 0, NULL));
    }

    /* An Enhanced MR file written by pydicom, laid out unlike ours (compare_pydicom.py
     * --make-enhanced: echo dimension first, measures and rescale per frame, signed pixels). */
    char script[1024];
    snprintf(script, sizeof script, "%s/tests/dicom/compare_pydicom.py", SW_SOURCE_DIR);
    const char *pe = tpath("py_made_enhanced.dcm");
    const char *mk[] = {SW_PYTHON3, script, "--make-enhanced", pe, NULL};
    run_ok(mk);
    json_array_append_new(manifest, describe(pe, 0, NULL));
    dcm_file *f = read_ok(pe, 0);
    cr_assert_eq(f->nframes, 4);
    for (int i = 0; i < 4; i++) {
        const dcm_image *r = &f->frames[i];
        cr_assert_eq(r->echo_number, i / 2 + 1, "frame %d echo %d", i + 1, r->echo_number);
        cr_assert_eq(r->in_stack_position, i % 2 + 1);
        cr_assert_float_eq(r->echo_time_ms, 15.0 * (i / 2 + 1), 0);
        cr_assert_float_eq(r->repetition_time_ms, 1200, 0);
        cr_assert_float_eq(r->rescale_slope, 0.75 + 0.5 * i, 0);
        cr_assert_float_eq(r->rescale_intercept, -2.25 * i, 0);
        cr_assert_float_eq(r->ipp[0], -3.5 + 7.0 * (i % 2 + 1), 0);
        cr_assert_float_eq(r->iop[1], 1, 0);
        cr_assert_float_eq(r->pixel_spacing[1], 1.25, 0);
        cr_assert_float_eq(r->slice_thickness_mm, 3, 0);
        /* pixel k of frame i is (k (i + 3) - 40) x slope + intercept */
        for (int k = 0; k < r->rows * r->columns; k++)
            cr_assert_eq(r->pixels[k],
                         (float)((k * (i + 3) - 40) * r->rescale_slope + r->rescale_intercept));
    }
    dcm_file_free(f);

    const char *mf = tpath("manifest.json");
    cr_assert_eq(json_dump_file(manifest, mf, JSON_INDENT(1)), 0);
    json_decref(manifest);
    static char out[1 << 16];
    const char *argv[] = {SW_PYTHON3, script, mf, NULL};
    int rc = run(argv, out, sizeof out);
    cr_assert_eq(rc, 0, "pydicom disagrees (exit %d):\n%s", rc, out);
    cr_assert_not_null(strstr(out, " passed, 0 failed"), "%s", out);
    free(w.pixels);
    for (int i = 0; i < NF; i++)
        free(fr[i].pixels);
}

/* ---- pydicom's corpus: every file read or refused by name, never a crash ---------------- */

static int corpus_files, corpus_ok, corpus_refused;

static void check_one(const char *path, const void *buf, size_t len)
{
    for (int header_only = 0; header_only <= 1; header_only++) {
        dcm_read_opts o = {header_only};
        dcm_file *ff = NULL, *fb = NULL;
        sw_error ef, eb;
        sw_error_clear(&ef);
        sw_error_clear(&eb);
        sw_status sf = dcm_read_file(path, &o, &ff, &ef);
        sw_status sb = dcm_read_buffer(buf, len, path, &o, &fb, &eb);
        cr_assert_eq(sf, sb, "%s (header_only %d): file says '%s', buffer says '%s'", path,
                     header_only, ef.msg, eb.msg);
        if (sf == SW_OK) {
            cr_assert_not_null(ff);
            cr_assert_geq(ff->nframes, 1);
            cr_assert_eq(ff->nframes, fb->nframes, "%s", path);
            for (int i = 0; i < ff->nframes; i++) {
                const dcm_image *a = &ff->frames[i], *b = &fb->frames[i];
                cr_assert_str_eq(a->sop_instance_uid, b->sop_instance_uid, "%s", path);
                if (header_only) {
                    cr_assert_null(a->pixels);
                    continue;
                }
                cr_assert_gt(a->rows, 0, "%s", path);
                cr_assert_gt(a->columns, 0, "%s", path);
                assert_same_pixels(a, b, path);
                int bad = 0;
                for (int k = 0; k < a->rows * a->columns; k++)
                    bad += !isfinite(a->pixels[k]);
                cr_assert_eq(bad, 0, "%s: %d pixels not finite", path, bad);
            }
            if (!header_only)
                corpus_ok++;
        } else {
            cr_assert_null(ff);
            cr_assert_null(fb);
            cr_assert(sf == SW_EFORMAT || sf == SW_EUNSUPPORTED, "%s: status %d: %s", path, sf,
                      ef.msg);
            assert_message(&ef, path);
            assert_message(&eb, path);
            if (!header_only)
                corpus_refused++;
        }
        dcm_file_free(ff);
        dcm_file_free(fb);
    }
}

static int visit(const char *p, const struct stat *sb, int flag, struct FTW *ftw)
{
    (void)ftw;
    if (flag != FTW_F || !S_ISREG(sb->st_mode) || strstr(p, "__pycache__"))
        return 0;
    size_t len;
    void *buf = slurp(p, &len);
    check_one(p, buf, len);
    free(buf);
    corpus_files++;
    return 0;
}

static sw_status read_status(const char *path, sw_error *e)
{
    dcm_file *f = NULL;
    sw_error_clear(e);
    sw_status st = dcm_read_file(path, NULL, &f, e);
    dcm_file_free(f);
    return st;
}

Test(dicom, pydicom_corpus, .timeout = 120)
{
    const char *root = corpus("");
    cr_assert_eq(nftw(root, visit, 16, FTW_PHYS), 0, "walk %s", root);
    cr_log_info("corpus: %d files, %d read, %d refused", corpus_files, corpus_ok, corpus_refused);
    cr_assert_geq(corpus_files, 150, "only %d files under %s", corpus_files, root);
    cr_assert_geq(corpus_ok, 40);
    cr_assert_geq(corpus_refused, 40);

    sw_error e;
    const char *j2k[] = {"test_files/JPEG2000.dcm", "test_files/MR_small_jp2klossless.dcm"};
    for (int i = 0; i < 2; i++) {
        const char *p = corpus(j2k[i]);
        cr_assert_eq(read_status(p, &e), SW_EUNSUPPORTED, "%s", e.msg);
        char want[1200];
        snprintf(want, sizeof want, "dicom: %s: JPEG 2000 is not supported", p);
        cr_assert_str_eq(e.msg, want);
    }
    const char *tr = corpus("test_files/MR_truncated.dcm");
    cr_assert_eq(read_status(tr, &e), SW_EFORMAT, "%s", e.msg);
    assert_message(&e, tr);
    cr_assert_not_null(strstr(e.msg, "truncated"), "%s", e.msg);
    const char *rgb = corpus("test_files/SC_rgb_rle.dcm");
    cr_assert_eq(read_status(rgb, &e), SW_EUNSUPPORTED, "%s", e.msg);
    cr_assert_not_null(strstr(e.msg, "only monochrome"), "%s", e.msg);

    /* The corpus's MR_small in every encoding is one image (pydicom's test-file notes). */
    dcm_file *ref = read_ok(corpus("test_files/MR_small.dcm"), 0);
    const char *twins[] = {"test_files/MR_small_bigendian.dcm",
                           "test_files/MR_small_implicit.dcm",
                           "test_files/MR_small_expb.dcm",
                           "test_files/MR_small_RLE.dcm",
                           "test_files/MR_small_jpeg_ls_lossless.dcm",
                           "test_files/MR_small_padded.dcm"};
    for (size_t i = 0; i < sizeof twins / sizeof twins[0]; i++) {
        dcm_file *f = read_ok(corpus(twins[i]), 0);
        assert_same_pixels(&ref->frames[0], &f->frames[0], twins[i]);
        assert_same_geometry(&ref->frames[0], &f->frames[0], 0);
        dcm_file_free(f);
    }
    /* Spot values of MR_small as pydicom reads them (pixel_array[0, :4] = 905 1019 1227 1259). */
    const float want[4] = {905, 1019, 1227, 1259};
    for (int k = 0; k < 4; k++)
        cr_assert_eq(ref->frames[0].pixels[k], want[k]);
    dcm_file_free(ref);
}

/* Every cut of one of our files fails cleanly, from a file and from a buffer. */
Test(dicom, truncation_sweep)
{
    dcm_image w;
    make_image(&w, 24, 24, 11);
    sw_error e;
    sw_error_clear(&e);
    const char *src = tpath("whole.dcm");
    cr_assert_eq(dcm_write_mr(src, &w, &e), SW_OK, "%s", e.msg);
    size_t len;
    unsigned char *buf = slurp(src, &len);
    const char *cut = tpath("cut.dcm");
    int tried = 0;
    for (size_t n = 1; n < len; n += (n < 400 ? 7 : 61)) {
        for (int from_file = 0; from_file <= 1; from_file++) {
            dcm_file *f = NULL;
            sw_error_clear(&e);
            sw_status st;
            if (from_file) {
                spit(cut, buf, n);
                st = dcm_read_file(cut, NULL, &f, &e);
            } else {
                st = dcm_read_buffer(buf, n, "cut", NULL, &f, &e);
            }
            cr_assert_neq(st, SW_OK, "a file cut to %zu of %zu bytes was read", n, len);
            cr_assert_null(f);
            assert_message(&e, from_file ? cut : "cut");
            tried++;
        }
    }
    /* The last byte missing. */
    dcm_file *f = NULL;
    sw_error_clear(&e);
    cr_assert_neq(dcm_read_buffer(buf, len - 1, "cut", NULL, &f, &e), SW_OK);
    cr_assert_null(f);
    cr_assert_gt(tried, 100);
    free(buf);
    free(w.pixels);
}

/* Random damage to our own files (a few bytes changed, fixed seed): every result is a clean read
 * or a named refusal. Run under the sanitizers, this is the quick form of the fuzz target. */
Test(dicom, mutation_sweep, .timeout = 120)
{
    dcm_image w;
    make_image(&w, 16, 12, 12);
    dcm_image fr[NF];
    make_frames(fr, 1);
    sw_error e;
    sw_error_clear(&e);
    const char *a = tpath("m_classic.dcm"), *b = tpath("m_enh.dcm");
    cr_assert_eq(dcm_write_mr(a, &w, &e), SW_OK, "%s", e.msg);
    cr_assert_eq(dcm_write_enhanced_mr(b, fr, NF, &e), SW_OK, "%s", e.msg);
    const char *files[] = {a, b};
    uint64_t x = 0x9E3779B97F4A7C15ull;
    int ok = 0, refused = 0;
    for (int fi = 0; fi < 2; fi++) {
        size_t len;
        unsigned char *orig = slurp(files[fi], &len);
        unsigned char *buf = malloc(len);
        cr_assert_not_null(buf);
        for (int it = 0; it < 400; it++) {
            memcpy(buf, orig, len);
            int nflip = 1 + (int)(x % 4);
            for (int k = 0; k < nflip; k++) {
                x = x * 6364136223846793005ull + 1442695040888963407ull;
                /* mostly in the header, where structure lives */
                size_t span = (x >> 60) < 12 ? (len < 2048 ? len : 2048) : len;
                size_t at = (size_t)(x >> 33) % span;
                buf[at] = (unsigned char)(x >> 17);
            }
            x = x * 6364136223846793005ull + 1442695040888963407ull;
            size_t n = (x >> 62) == 0 ? (size_t)(x >> 33) % len + 1 : len; /* some cut short */
            for (int header_only = 0; header_only <= 1; header_only++) {
                dcm_read_opts o = {header_only};
                dcm_file *f = NULL;
                sw_error_clear(&e);
                sw_status st = dcm_read_buffer(buf, n, "mutant", &o, &f, &e);
                if (st == SW_OK) {
                    cr_assert_not_null(f);
                    cr_assert_geq(f->nframes, 1);
                    ok++;
                } else {
                    cr_assert_null(f);
                    assert_message(&e, "mutant");
                    refused++;
                }
                dcm_file_free(f);
            }
        }
        free(buf);
        free(orig);
    }
    cr_log_info("mutants: %d read, %d refused", ok, refused);
    cr_assert_gt(ok, 0);
    cr_assert_gt(refused, 0);
    free(w.pixels);
    for (int i = 0; i < NF; i++)
        free(fr[i].pixels);
}

/* Reading speed, for the record (cr_log_info; ./test_dicom --verbose --filter 'dicom/speed*'):
 * eleven reads of 256 x 256 slices per transfer syntax, full and header-only. What is asserted is
 * that every encoding decodes to the same pixels; the times are information, not a limit. */
static double seconds(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (double)t.tv_sec + (double)t.tv_nsec * 1e-9;
}

Test(dicom, speed_report, .timeout = 120)
{
    enum { NS = 11 };
    const struct conv plain = {"explicit", NULL, NULL, NULL, TS_EXPLICIT_LE};
    const struct conv *kinds[] = {&plain, &lossless[0], &lossless[3], &lossless[5], &lossless[6]};
    dcm_image w;
    make_image(&w, 256, 256, 13);
    char names[NS][64];
    sw_error e;
    for (int s = 0; s < NS; s++) {
        snprintf(names[s], sizeof names[s], "slice%02d.dcm", s);
        dcm_new_uid(w.sop_instance_uid, NULL);
        w.ipp[2] = 10.0 * s;
        sw_error_clear(&e);
        cr_assert_eq(dcm_write_mr(tpath(names[s]), &w, &e), SW_OK, "%s", e.msg);
    }
    dcm_file *ref = read_ok(tpath(names[0]), 0);
    for (size_t k = 0; k < sizeof kinds / sizeof kinds[0]; k++) {
        /* The plain slices; for the other syntaxes one converted slice read NS times (the same
         * work per read, and one converter run instead of NS). */
        const char *files[NS];
        const char *conv = NULL;
        if (kinds[k] != &plain) {
            char n[160];
            snprintf(n, sizeof n, "%.32s_%.64s", kinds[k]->name, names[0]);
            conv = tpath(n);
            convert(kinds[k], tpath(names[0]), conv);
        }
        for (int s = 0; s < NS; s++)
            files[s] = conv ? conv : tpath(names[s]);
        for (int header_only = 0; header_only <= 1; header_only++) {
            double t0 = seconds();
            for (int s = 0; s < NS; s++) {
                dcm_file *f = read_ok(files[s], header_only);
                if (s == 0 && !header_only)
                    assert_same_pixels(&ref->frames[0], &f->frames[0], kinds[k]->name);
                dcm_file_free(f);
            }
            double ms = (seconds() - t0) * 1e3 / NS;
            cr_log_info("read %-10s %-11s %.3f ms per 256x256 image", kinds[k]->name,
                        header_only ? "header-only" : "full", ms);
        }
    }
    dcm_file_free(ref);
    free(w.pixels);
}

/* Without the data dictionary DCMTK would read implicit-VR files as unknown bytes: dcm_init must
 * refuse. (No fixture here: Criterion runs each test in a fresh child of a runner that never
 * touched DCMTK, so the dictionary is not loaded yet.) */
Test(dicom_nodict, init_refuses_without_dictionary)
{
    cr_assert_eq(setenv("DCMDICTPATH", "/nonexistent/slicewarden-no-dicom.dic", 1), 0);
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(dcm_init(&e), SW_EIO);
    cr_assert_not_null(strstr(e.msg, "data dictionary"), "%s", e.msg);
    cr_assert_eq(strncmp(e.msg, "dicom: ", 7), 0, "%s", e.msg);
    dcm_file *f = NULL;
    cr_assert_eq(dcm_read_file("x.dcm", NULL, &f, &e), SW_EINVAL, "reads must stay refused");
}

/* Two threads reading the same files at once (plain, JPEG-LS, RLE, Enhanced, a character set):
 * every read equals the single-threaded one. A smoke test of the claim in dicom.h that reads
 * share no state of ours once dcm_init has run; it is not a race detector. */
struct reader_job {
    const char *const *files;
    int nfiles;
    dcm_file *const *ref;
    int rounds;
    int bad; /* reads that failed or differed */
};

static void *reader_thread(void *arg)
{
    struct reader_job *j = arg;
    for (int r = 0; r < j->rounds; r++)
        for (int i = 0; i < j->nfiles; i++) {
            dcm_file *f = NULL;
            sw_error e;
            sw_error_clear(&e);
            if (dcm_read_file(j->files[i], NULL, &f, &e) != SW_OK) {
                j->bad++;
                continue;
            }
            const dcm_file *g = j->ref[i];
            int same = f->nframes == g->nframes;
            for (int k = 0; same && k < f->nframes; k++) {
                const dcm_image *a = &f->frames[k], *b = &g->frames[k];
                same = a->rows == b->rows && a->columns == b->columns &&
                       strcmp(a->patient_name, b->patient_name) == 0 &&
                       memcmp(a->pixels, b->pixels,
                              sizeof(float) * (size_t)a->rows * (size_t)a->columns) == 0;
            }
            j->bad += !same;
            dcm_file_free(f);
        }
    return NULL;
}

Test(dicom, concurrent_reads, .timeout = 120)
{
    dcm_image w;
    make_image(&w, 64, 64, 14);
    dcm_image fr[NF];
    make_frames(fr, 1);
    sw_error e;
    sw_error_clear(&e);
    const char *plain = tpath("t_plain.dcm"), *enh = tpath("t_enh.dcm");
    cr_assert_eq(dcm_write_mr(plain, &w, &e), SW_OK, "%s", e.msg);
    cr_assert_eq(dcm_write_enhanced_mr(enh, fr, NF, &e), SW_OK, "%s", e.msg);
    const char *ls = tpath("t_ls.dcm"), *rle = tpath("t_rle.dcm");
    convert(&lossless[5], plain, ls);
    convert(&lossless[6], enh, rle);
    const char *files[] = {plain,
                           enh,
                           ls,
                           rle,
                           corpus("charset_files/chrRuss.dcm"),
                           corpus("test_files/JPGExtended.dcm")};
    enum { NFILES = sizeof files / sizeof files[0] };
    dcm_file *ref[NFILES];
    for (int i = 0; i < NFILES; i++)
        ref[i] = read_ok(files[i], 0);
    struct reader_job jobs[2];
    pthread_t th[2];
    for (int t = 0; t < 2; t++) {
        jobs[t] = (struct reader_job){files, NFILES, ref, 15, 0};
        cr_assert_eq(pthread_create(&th[t], NULL, reader_thread, &jobs[t]), 0);
    }
    for (int t = 0; t < 2; t++) {
        cr_assert_eq(pthread_join(th[t], NULL), 0);
        cr_assert_eq(jobs[t].bad, 0, "thread %d: %d reads failed or differed", t, jobs[t].bad);
    }
    for (int i = 0; i < NFILES; i++)
        dcm_file_free(ref[i]);
    free(w.pixels);
    for (int i = 0; i < NF; i++)
        free(fr[i].pixels);
}
