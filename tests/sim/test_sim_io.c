/* test_sim_io.c: the simulator's files: DICOM read back through dicom.h and pydicom, truth.json
 * through jansson, and the profile recomputed in numpy by an independent Bloch method. */
#define _XOPEN_SOURCE 700
#include <criterion/criterion.h>
#include <ftw.h>
#include <jansson.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <unistd.h>

#include "dicom.h"
#include "sim.h"

#define PYTHON "/usr/bin/python3" /* Debian's interpreter, which sees numpy and pydicom */

static char tmpdir[256];

static void setup(void)
{
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(dcm_init(&err), SW_OK, "%s", err.msg);
    const char *base = getenv("TMPDIR");
    snprintf(tmpdir, sizeof tmpdir, "%s/simio-XXXXXX", base && base[0] ? base : "/tmp");
    cr_assert_not_null(mkdtemp(tmpdir));
}

static int rm_one(const char *path, const struct stat *sb, int flag, struct FTW *ftw)
{
    (void)sb;
    (void)flag;
    (void)ftw;
    return remove(path);
}

static void teardown(void)
{
    nftw(tmpdir, rm_one, 16, FTW_DEPTH | FTW_PHYS);
    sim_cleanup();
}

static sim_series *render(const sim_params *p)
{
    sw_error err;
    sw_error_clear(&err);
    sim_series *s = NULL;
    cr_assert_eq(sim_series_render(p, &s, &err), SW_OK, "%s", err.msg);
    return s;
}

static void write_to(const sim_series *s, const char *sub, char *dir, size_t n)
{
    sw_error err;
    sw_error_clear(&err);
    snprintf(dir, n, "%s/%s", tmpdir, sub);
    cr_assert_eq(sim_series_write(s, dir, &err), SW_OK, "%s", err.msg);
}

static int run_python(const char *mode, const char *arg)
{
    char cmd[1024];
    snprintf(cmd, sizeof cmd, PYTHON " %s/tests/sim/xcheck_sim.py %s '%s'", SW_SOURCE_DIR, mode,
             arg);
    int rc = system(cmd);
    cr_assert_neq(rc, -1, "cannot run %s", cmd);
    return WIFEXITED(rc) ? WEXITSTATUS(rc) : 128;
}

TestSuite(io, .init = setup, .fini = teardown);

/* What is written is what was rendered: every file read back through dicom.h carries the same
 * pixels, geometry, echo and instance as in memory, and truth.json names every file. */
Test(io, classic_files_read_back_exactly)
{
    sim_params p;
    sim_params_default(&p);
    p.kind = SIM_SERIES_T2;
    p.shuffle = 1;
    p.reverse_instances = 1;
    p.seed = 11;
    sim_series *s = render(&p);
    char dir[512], path[700];
    write_to(s, "t2", dir, sizeof dir);
    for (int i = 0; i < s->n_images; i++) {
        snprintf(path, sizeof path, "%s/%s", dir, s->file_name[i]);
        dcm_file *f = NULL;
        sw_error err;
        sw_error_clear(&err);
        cr_assert_eq(dcm_read_file(path, NULL, &f, &err), SW_OK, "%s", err.msg);
        cr_assert_eq(f->nframes, 1);
        const dcm_image *a = &s->images[i], *b = &f->frames[0];
        cr_assert_str_eq(a->sop_instance_uid, b->sop_instance_uid);
        cr_assert_str_eq(a->series_instance_uid, b->series_instance_uid);
        cr_assert_eq(b->echo_number, s->echo[i]);
        cr_assert_eq(b->instance_number, a->instance_number);
        cr_assert_float_eq(b->echo_time_ms, s->echo[i] == 1 ? 20.0 : 80.0, 1e-9);
        cr_assert_float_eq(b->repetition_time_ms, 2000.0, 1e-9);
        for (int k = 0; k < 3; k++)
            cr_assert_float_eq(b->ipp[k], a->ipp[k], 1e-4);
        for (int k = 0; k < 6; k++)
            cr_assert_float_eq(b->iop[k], a->iop[k], 1e-6);
        cr_assert_str_eq(b->station_name, "ALDMR1");
        cr_assert_str_eq(b->institution, "Alderbrook Regional Hospital");
        cr_assert_eq(b->bits_stored, 12);
        cr_assert_float_eq(b->pixel_bandwidth_hz, 130.0, 1e-9, "PixelBandwidth is the readout's");
        cr_assert_str_eq(b->patient_position, "HFS");
        cr_assert_eq(memcmp(a->pixels, b->pixels, sizeof(float) * 256 * 256), 0,
                     "%s: pixels differ", s->file_name[i]);
        dcm_file_free(f);
    }
    /* truth.json through jansson */
    snprintf(path, sizeof path, "%s/truth.json", dir);
    json_error_t jerr;
    json_t *root = json_load_file(path, 0, &jerr);
    cr_assert_not_null(root, "truth.json: %s", jerr.text);
    json_t *files = json_object_get(root, "files");
    cr_assert_eq(json_array_size(files), (size_t)s->n_images);
    for (int i = 0; i < s->n_images; i++) {
        json_t *e = json_array_get(files, i);
        cr_assert_str_eq(json_string_value(json_object_get(e, "name")), s->file_name[i]);
        cr_assert_eq(json_integer_value(json_object_get(e, "slice")), s->slice[i]);
    }
    json_t *echoes = json_object_get(root, "echoes");
    for (int e = 0; e < 2; e++) {
        double w = json_real_value(json_object_get(json_array_get(echoes, e), "thickness_fwhm_mm"));
        cr_assert_float_eq(w, s->truth.thickness_mm[e], 1e-8);
    }
    json_t *sl = json_object_get(root, "slices");
    cr_assert_eq(json_array_size(sl), 11);
    json_t *wd = json_object_get(root, "wedges");
    cr_assert_eq(json_array_size(wd), 2);
    cr_assert_str_eq(json_string_value(json_object_get(root, "seed")), "11");
    json_decref(root);

    /* a second write into the same folder is refused (nothing overwritten) */
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(sim_series_write(s, dir, &err), SW_EINVAL);
    cr_assert(strstr(err.msg, "already") != NULL, "%s", err.msg);
    sim_series_free(s);
}

/* Enhanced MR: one file, one frame per image, per-frame position and echo. */
Test(io, enhanced_file_holds_every_frame)
{
    sim_params p;
    sim_params_default(&p);
    p.kind = SIM_SERIES_T2;
    p.enhanced = 1;
    sim_series *s = render(&p);
    char dir[512], path[700];
    write_to(s, "mf", dir, sizeof dir);
    snprintf(path, sizeof path, "%s/%s", dir, s->file_name[0]);
    dcm_file *f = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(dcm_read_file(path, NULL, &f, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(f->nframes, 22);
    for (int i = 0; i < 22; i++) {
        const dcm_image *b = &f->frames[i];
        const dcm_image *a = NULL;
        for (int k = 0; k < s->n_images; k++)
            if (fabs(s->images[k].ipp[2] - b->ipp[2]) < 1e-4 && s->echo[k] == b->echo_number)
                a = &s->images[k];
        cr_assert_not_null(a, "frame %d (z %.2f, echo %d) not rendered", i, b->ipp[2],
                           b->echo_number);
        cr_assert_eq(memcmp(a->pixels, b->pixels, sizeof(float) * 256 * 256), 0, "frame %d differs",
                     i);
        cr_assert_str_eq(b->sop_class_uid, "1.2.840.10008.5.1.4.1.1.4.1");
    }
    dcm_file_free(f);
    sim_series_free(s);
}

/* pydicom (an independent reader) brings every orientation variant back to the standard series
 * from the DICOM geometry alone; see xcheck_sim.py. */
Test(io, pydicom_sees_every_variant_in_the_phantom_frame)
{
    const struct {
        const char *name;
        sim_orientation o;
        int shuffle, enhanced;
    } v[] = {
        {"std", SIM_ORIENT_STANDARD, 0, 0},
        {"flip-rows", SIM_ORIENT_FLIP_ROWS, 1, 0},
        {"flip-columns", SIM_ORIENT_FLIP_COLUMNS, 0, 0},
        {"transposed", SIM_ORIENT_TRANSPOSED, 0, 0},
        {"feet-first", SIM_ORIENT_FEET_FIRST, 1, 0},
        {"enhanced", SIM_ORIENT_STANDARD, 0, 1},
    };
    char root[512];
    snprintf(root, sizeof root, "%s/variants", tmpdir);
    cr_assert_eq(mkdir(root, 0755), 0);
    for (size_t i = 0; i < sizeof v / sizeof v[0]; i++) {
        sim_params p;
        sim_params_default(&p);
        p.kind = SIM_SERIES_T2;
        p.matrix = 128;
        p.n_slices = 5;
        p.pose.rot_deg = 4;
        p.pose.du_mm = 3;
        p.orientation = v[i].o;
        p.shuffle = v[i].shuffle;
        p.enhanced = v[i].enhanced;
        sim_series *s = render(&p);
        char dir[700];
        snprintf(dir, sizeof dir, "variants/%s", v[i].name);
        char full[700];
        write_to(s, dir, full, sizeof full);
        sim_series_free(s);
    }
    cr_assert_eq(run_python("series", root), 0, "pydicom cross-check failed (output above)");
}

/* The profile recomputed in numpy with Cayley-Klein spinors (a different Bloch method) and, at a
 * small flip angle, with the pulse's Fourier transform (small-tip approximation). */
Test(io, numpy_recomputes_the_bloch_profile)
{
    const struct {
        double tbw, flip;
        int se;
        double ratio;
    } c[] = {{4, 10, 0, 0}, {8, 10, 0, 0}, {4, 90, 0, 0}, {6, 90, 1, 0}, {4, 90, 1, 2.0}};
    for (size_t i = 0; i < sizeof c / sizeof c[0]; i++) {
        sim_profile_params pp = {.kind = SIM_PROFILE_BLOCH_SINC,
                                 .thickness_mm = 5,
                                 .tbw = c[i].tbw,
                                 .duration_ms = 3.2,
                                 .flip_deg = c[i].flip,
                                 .spin_echo = c[i].se,
                                 .refocus_ratio = c[i].ratio,
                                 .steps = 500};
        sim_profile *pr = NULL;
        cr_assert_eq(sim_profile_make(&pp, &pr, NULL), SW_OK);
        char path[512];
        snprintf(path, sizeof path, "%s/profile%zu.txt", tmpdir, i);
        FILE *f = fopen(path, "w");
        cr_assert_not_null(f);
        fprintf(f, "%.17g %.17g %.17g %d %.17g %d %.17g\n", pp.tbw, pp.duration_ms, pp.flip_deg,
                pp.spin_echo, pr->gradient_mt_per_m, pp.steps, c[i].ratio > 0 ? c[i].ratio : 1.0);
        for (int k = 0; k < pr->n; k++)
            fprintf(f, "%.17g %.17g %.17g\n", pr->z0_mm + k * pr->dz_mm, pr->re[k], pr->im[k]);
        fclose(f);
        sim_profile_free(pr);
        cr_assert_eq(run_python("profile", path), 0, "case %zu: numpy cross-check failed", i);
    }
}

/* dciodvfy (dicom3tools) finds no error in a classic and an Enhanced MR file; warnings about
 * attributes the writer leaves empty (Study ID) are allowed. */
Test(io, dciodvfy_finds_no_errors)
{
    if (access("/usr/bin/dciodvfy", X_OK) != 0)
        cr_assert_fail("dciodvfy (Debian package dicom3tools) is needed for this check");
    for (int enh = 0; enh < 2; enh++) {
        sim_params p;
        sim_params_default(&p);
        p.matrix = 64;
        p.n_slices = 2;
        p.enhanced = enh;
        p.kind = enh ? SIM_SERIES_T2 : SIM_SERIES_T1;
        sim_series *s = render(&p);
        char dir[512], cmd[1200];
        write_to(s, enh ? "v-mf" : "v-cl", dir, sizeof dir);
        snprintf(cmd, sizeof cmd, "/usr/bin/dciodvfy '%s/%s' 2>&1", dir, s->file_name[0]);
        FILE *pipe = popen(cmd, "r");
        cr_assert_not_null(pipe);
        char line[1024];
        int errors = 0, iod = 0;
        while (fgets(line, sizeof line, pipe)) {
            errors += !strncmp(line, "Error", 5);
            iod += !strcmp(line, enh ? "EnhancedMRImage\n" : "MRImage\n");
        }
        pclose(pipe);
        cr_assert_eq(iod, 1, "dciodvfy did not recognise the %s IOD", enh ? "Enhanced MR" : "MR");
        cr_assert_eq(errors, 0, "dciodvfy reports %d errors on %s", errors, s->file_name[0]);
        sim_series_free(s);
    }
}
