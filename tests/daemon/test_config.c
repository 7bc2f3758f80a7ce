/* test_config.c: the configuration, model and tolerance files: defaults, a round trip through the
 * printed form, rejection naming the line, rule selection, safe names. */
#include <criterion/criterion.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "config.h"
#include "files.h"

static char *write_temp(const char *text)
{
    char *path = strdup("/tmp/sw-config-XXXXXX");
    int fd = mkstemp(path);
    cr_assert(fd >= 0);
    FILE *f = fdopen(fd, "w");
    fputs(text, f);
    fclose(f);
    return path;
}

Test(config, defaults_and_resolve)
{
    wd_config c;
    wd_config_default(&c);
    cr_assert_str_eq(c.folder, "/var/lib/slicewarden/incoming");
    cr_assert_eq(c.quiet_seconds, 30.0);
    cr_assert_eq(c.move_files, 1);
    sw_strlcpy(c.folder, "/srv/qa/incoming/", sizeof c.folder);
    wd_config_resolve(&c);
    cr_assert_str_eq(c.archive, "/srv/qa/archive");
    cr_assert_str_eq(c.quarantine, "/srv/qa/quarantine");
    cr_assert_str_eq(c.ignored, "/srv/qa/ignored");
}

Test(config, printed_form_reads_back)
{
    wd_config a, b;
    sw_error err;
    sw_error_clear(&err);
    char *in = write_temp("[watch]\nfolder = /data/in\nquiet_seconds = 12.5\nmove_files = no\n"
                          "[analysis]\nhalf_level = floor\n[aliases]\nALDMR1 = North 1.5T\n");
    cr_assert_eq(wd_config_load(&a, in, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(a.quiet_seconds, 12.5);
    cr_assert_eq(a.move_files, 0);
    cr_assert_eq(a.half_level, AN_HALF_FLOOR_MODEL);
    cr_assert_str_eq(wd_config_alias(&a, "ALDMR1"), "North 1.5T");
    cr_assert_str_eq(wd_config_alias(&a, "ALDMR9"), "ALDMR9");
    char *out = strdup("/tmp/sw-config-print-XXXXXX");
    int fd = mkstemp(out);
    FILE *f = fdopen(fd, "w");
    wd_config_print(&a, f);
    fclose(f);
    cr_assert_eq(wd_config_load(&b, out, &err), SW_OK, "%s", err.msg);
    cr_assert_str_eq(b.folder, a.folder);
    cr_assert_eq(b.quiet_seconds, a.quiet_seconds);
    cr_assert_eq(b.move_files, a.move_files);
    cr_assert_eq(b.half_level, a.half_level);
    cr_assert_eq(b.n_aliases, 1);
    unlink(in);
    unlink(out);
    free(in);
    free(out);
}

/* Each bad file is rejected whole and the message names the file, the line and the reason. */
Test(config, bad_files_name_the_line)
{
    static const struct {
        const char *text;
        const char *line;
        const char *why;
    } cases[] = {
        {"[watch]\nfolder = /x\nquiet_seconds = soon\n", ":3:", "quiet_seconds must be a number"},
        {"[watch]\nquiet_seconds = 0\n", ":2:", "from 1 to 86400"},
        {"[watch]\nmove_files = perhaps\n", ":2:", "yes or no"},
        {"[analysis]\nhalf_level = middle\n", ":2:", "zero, floor, background"},
        {"[watch]\nfolder = /x\n[nonsense]\nkey = 1\n", ":4:", "unknown setting 'key' in [nonsense]"},
        {"[watch]\nfolder =\n", "", "folder must not be empty"},
        {"this is not ini\n", ":1:", ""},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        char *p = write_temp(cases[i].text);
        wd_config c;
        sw_error err;
        sw_error_clear(&err);
        cr_assert_eq(wd_config_load(&c, p, &err), SW_EINVAL, "case %zu", i);
        cr_assert(strstr(err.msg, p) != NULL, "case %zu: %s", i, err.msg);
        cr_assert(strstr(err.msg, cases[i].line) != NULL, "case %zu: %s", i, err.msg);
        cr_assert(strstr(err.msg, cases[i].why) != NULL, "case %zu: %s", i, err.msg);
        /* rejected whole: the defaults are back */
        cr_assert_str_eq(c.folder, "/var/lib/slicewarden/incoming");
        unlink(p);
        free(p);
    }
}

Test(config, model_file_over_the_large_phantom)
{
    an_model m, ref;
    an_model_large(&ref);
    sw_error err;
    sw_error_clear(&err);
    char *p = write_temp("[phantom]\nname = site-copy\n[wedges]\nbar_length_mm = 14.5\n");
    cr_assert_eq(wd_model_load(&m, p, &err), SW_OK, "%s", err.msg);
    cr_assert_str_eq(m.name, "site-copy");
    cr_assert_eq(m.bar_len0_mm, 14.5);
    cr_assert_eq(m.radius_mm, ref.radius_mm);
    cr_assert_eq(m.ramp[0].slope, ref.ramp[0].slope);
    unlink(p);
    free(p);
    /* an inconsistent model is refused by an_model_check, naming the file */
    p = write_temp("[insert]\nramps = 1\n");
    sw_error_clear(&err);
    cr_assert_eq(wd_model_load(&m, p, &err), SW_EINVAL);
    cr_assert(strstr(err.msg, "crossed ramps need two ramps") != NULL, "%s", err.msg);
    unlink(p);
    free(p);
}

/* The shipped example files are valid. */
Test(config, shipped_examples_are_valid)
{
    an_model m;
    wd_tolerances t;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(wd_model_load(&m, SW_SOURCE_DIR "/config/large-phantom.model", &err), SW_OK, "%s",
                 err.msg);
    an_model ref;
    an_model_large(&ref);
    cr_assert_eq(memcmp(&m, &ref, sizeof m), 0, "the shipped model file is the built-in model");
    cr_assert_eq(wd_tolerances_load(&t, SW_SOURCE_DIR "/config/tolerances.conf", &err), SW_OK,
                 "%s", err.msg);
    wd_config c;
    cr_assert_eq(wd_config_load(&c, SW_SOURCE_DIR "/config/slicewarden.conf", &err), SW_OK, "%s",
                 err.msg);
}

Test(config, tolerance_rules)
{
    wd_tolerances t;
    sw_error err;
    sw_error_clear(&err);
    char *p = write_temp("[default]\nthickness_fail = 0.7\nthickness_warn = 0.5\n"
                         "[rule north]\nstation = ALDMR1\nthickness_fail = 0.6\n"
                         "[rule north-t2]\nstation = ALDMR1\nseries_type = t2\nthickness_warn = 0.3\n");
    cr_assert_eq(wd_tolerances_load(&t, p, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(t.n_rules, 2);
    cr_assert_eq(wd_tolerances_for(&t, "ALDMR2", "t1")->thickness_fail, 0.7);
    cr_assert_eq(wd_tolerances_for(&t, "ALDMR1", "t1")->thickness_fail, 0.6);
    const an_tolerance *x = wd_tolerances_for(&t, "ALDMR1", "t2");
    cr_assert_str_eq(x->name, "north-t2");
    cr_assert_eq(x->thickness_warn, 0.3);
    cr_assert_eq(x->thickness_fail, 0.7, "a rule starts from the default set");
    unlink(p);
    free(p);
    p = write_temp("[default]\nthickness_fail = 0.4\nthickness_warn = 0.5\n");
    sw_error_clear(&err);
    cr_assert_eq(wd_tolerances_load(&t, p, &err), SW_EINVAL);
    cr_assert(strstr(err.msg, "thickness_warn must not exceed thickness_fail"), "%s", err.msg);
    unlink(p);
    free(p);
}

Test(files, safe_names)
{
    static const struct {
        const char *in, *out;
    } cases[] = {
        {"1.2.840.113619.2.55", "1.2.840.113619.2.55"},
        {"../../etc/passwd", "_._.._etc_passwd"},
        {"..", "_."},
        {"-rf", "_rf"},
        {".hidden", "_hidden"},
        {"a b/c\\d", "a_b_c_d"},
        {"\xc3\xa9t\xc3\xa9", "__t__"},
        {"", "unnamed"},
    };
    char buf[64];
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        wd_safe_component(cases[i].in, "unnamed", buf, sizeof buf);
        cr_assert_str_eq(buf, cases[i].out, "case %zu", i);
    }
}
