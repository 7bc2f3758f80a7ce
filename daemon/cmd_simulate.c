/* cmd_simulate.c: `slicewarden simulate [OPTIONS] OUTDIR`: writes a simulated phantom series (DICOM
 * files and truth.json) for tests, benches, demos and for checking the analysis by hand. */
#include <errno.h>
#include <getopt.h>
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "config.h"
#include "dicom.h"
#include "files.h"
#include "sim.h"
#include "wd.h"

static void usage(FILE *f)
{
    fprintf(
        f,
        "usage: slicewarden simulate [OPTIONS] OUTDIR\n"
        "Writes a simulated series of a ramp-and-wedge phantom into OUTDIR (created if absent),\n"
        "with truth.json beside the files: the slice profile's FWHM, each slice's displacement,\n"
        "the expected ramp lengths and bar length differences, the pose and the noise.\n"
        "\n"
        "Series\n"
        "  --series t1|t2          T1 spin echo TR 500 TE 20, or double-echo T2 TR 2000 TE 20/80 "
        "[t1]\n"
        "  --slices N              slices [the model's]\n"
        "  --model FILE            phantom model file (docs/models.md) [the built-in large phantom]\n"
        "  --orientation O         standard, flip-rows, flip-columns, transposed, feet-first\n"
        "  --enhanced              one Enhanced MR multi-frame file instead of one file per image\n"
        "  --shuffle               random file order and file names\n"
        "  --reverse-instances     InstanceNumber runs from the last slice to the first\n"
        "  --seed N                noise and order seed [1]\n"
        "Slice profile\n"
        "  --thickness MM          wanted FWHM [the model's nominal]\n"
        "  --prescribed MM         SliceThickness written in the files [the wanted FWHM]\n"
        "  --profile K             bloch (Hamming-windowed sinc), rect, gauss, rect-gauss [bloch]\n"
        "  --tbw X                 time-bandwidth product [4]\n"
        "  --pulse-ms X            pulse duration [3.2]\n"
        "  --flip DEG              excitation flip angle [90]\n"
        "  --no-refocus-profile    treat the 180-degree pulse as ideal (excitation profile only)\n"
        "  --refocus-ratio X       180-degree slab width over the excitation's [2]\n"
        "  --nominal-gradient      G = bandwidth / (gamma-bar thickness) instead of a calibrated "
        "FWHM\n"
        "  --no-steady-state       ignore the T1 steady state across the profile\n"
        "  --blur MM               rect-gauss: the Gaussian's FWHM [1]\n"
        "Acquisition\n"
        "  --snr X                 mean fluid signal / noise SD per channel, first echo; 0: none "
        "[100]\n"
        "  --shading X             receive-coil shading, rise at the phantom's rim (0..1) [0]\n"
        "  --matrix N  --fov MM  --oversample N       [256, 250, 4]\n"
        "  --t1 MS  --t2 MS        fluid relaxation times [150, 130]\n"
        "Pose and errors\n"
        "  --offset DU,DV          in-plane offset, image right and up (mm)\n"
        "  --rotation DEG          in-plane rotation, counter-clockwise as displayed\n"
        "  --tilt-v DEG            tilt about v (> 0: top ramp strip longer)\n"
        "  --tilt-u DEG            pitch (> 0: anterior side toward the last slice)\n"
        "  --position-offset MM    slice position error e(z) = offset + scale z\n"
        "  --position-scale PCT    ... scale in per cent\n"
        "  --cf-offset HZ          centre frequency error\n"
        "Identity (an invented scenario by default)\n"
        "  --station NAME  --serial S  --scanner-model M  --institution I\n"
        "  --date YYYYMMDD  --time HHMMSS  --field T  --series-number N\n"
        "  --quiet                 print nothing on success\n"
        "Simulated images are for testing; never file them as patient or scanner records.\n");
}

static int parse_double(const char *opt, const char *s, double *out)
{
    char *end = NULL;
    errno = 0;
    double v = strtod(s, &end);
    if (errno || end == s || *end || !isfinite(v)) {
        fprintf(stderr, "slicewarden simulate: %s: '%s' is not a number\n", opt, s);
        return -1;
    }
    *out = v;
    return 0;
}

static int parse_int(const char *opt, const char *s, int *out)
{
    char *end = NULL;
    errno = 0;
    long v = strtol(s, &end, 10);
    if (errno || end == s || *end || v < -1000000 || v > 1000000) {
        fprintf(stderr, "slicewarden simulate: %s: '%s' is not an integer\n", opt, s);
        return -1;
    }
    *out = (int)v;
    return 0;
}

static int parse_pair(const char *opt, const char *s, double *a, double *b)
{
    char buf[128];
    sw_strlcpy(buf, s, sizeof buf);
    char *comma = strchr(buf, ',');
    if (!comma) {
        fprintf(stderr, "slicewarden simulate: %s: expected DU,DV, got '%s'\n", opt, s);
        return -1;
    }
    *comma = '\0';
    return parse_double(opt, buf, a) || parse_double(opt, comma + 1, b) ? -1 : 0;
}

static int parse_name(const char *opt, const char *s, const char *const *names, int n, int *out)
{
    for (int i = 0; i < n; i++)
        if (!strcmp(s, names[i])) {
            *out = i;
            return 0;
        }
    fprintf(stderr, "slicewarden simulate: %s: unknown value '%s'\n", opt, s);
    return -1;
}

static const char *const series_names[] = {"t1", "t2"};
static const char *const profile_names[] = {"bloch", "rect", "gauss", "rect-gauss"};
static const char *const orient_names[] = {"standard", "flip-rows", "flip-columns", "transposed",
                                           "feet-first"};

static void summary(const sim_series *s, const char *dir)
{
    const sim_truth *t = &s->truth;
    const sim_params *p = &s->params;
    printf("simulated %s series of %s: %d image%s in %s%s\n", p->kind == SIM_SERIES_T2 ? "T2" : "T1",
           s->model.name, s->n_images, s->n_images == 1 ? "" : "s", dir,
           p->enhanced ? " (one Enhanced MR file)" : "");
    printf("  series %s, %s, %s, seed %" PRIu64 "\n", s->images[0].series_instance_uid,
           orient_names[p->orientation], s->images[0].patient_position, p->seed);
    for (int e = 0; e < t->n_echoes; e++) {
        printf("  echo %d (TE %g ms): slice thickness (profile FWHM) %.3f mm", e + 1, p->te_ms[e],
               t->thickness_mm[e]);
        if (t->has_ramps && s->model.n_ramps > 1)
            printf(", ramp strips %.2f / %.2f mm on slice %d", t->ramp[e].length_mm[0],
                   t->ramp[e].length_mm[1], t->ramp_ordinal);
        else if (t->has_ramps)
            printf(", ramp strip %.2f mm on slice %d", t->ramp[e].length_mm[0], t->ramp_ordinal);
        printf("\n");
    }
    for (int j = 0; j < 2; j++)
        if (t->has_wedges && t->wedge[j].ordinal > 0)
            printf("  slice %d: bar length difference %+.3f mm (left %.3f, right %.3f)\n",
                   t->wedge[j].ordinal, t->wedge[j].difference_mm, t->wedge[j].left_mm,
                   t->wedge[j].right_mm);
    printf("  displacement d_k (mm):");
    for (int k = 0; k < t->n_slices; k++)
        printf(" %+.3f", t->displacement_mm[k]);
    printf("\n");
    if (t->noise_sigma > 0)
        printf("  SNR %.1f, noise SD %.2f per channel (stored units)\n", t->snr, t->noise_sigma);
    else
        printf("  noise-free\n");
    printf("  truth: %s/truth.json\n", dir);
}

int wd_cmd_simulate(int argc, char **argv)
{
    enum {
        O_SERIES = 1000,
        O_SLICES,
        O_MODEL,
        O_ORIENT,
        O_ENHANCED,
        O_SHUFFLE,
        O_REVERSE,
        O_SEED,
        O_THICK,
        O_PRESCRIBED,
        O_PROFILE,
        O_TBW,
        O_PULSE,
        O_FLIP,
        O_NOREF,
        O_REFRATIO,
        O_NOMINAL,
        O_NOSS,
        O_BLUR,
        O_SNR,
        O_SHADING,
        O_MATRIX,
        O_FOV,
        O_OVERSAMPLE,
        O_T1,
        O_T2,
        O_OFFSET,
        O_ROT,
        O_TILTV,
        O_TILTU,
        O_POFF,
        O_PSCALE,
        O_CF,
        O_STATION,
        O_SERIAL,
        O_SCANNER,
        O_INST,
        O_DATE,
        O_TIME,
        O_FIELD,
        O_SERNUM,
        O_QUIET,
        O_HELP
    };
    static const struct option opts[] = {
        {"series", required_argument, NULL, O_SERIES},
        {"slices", required_argument, NULL, O_SLICES},
        {"model", required_argument, NULL, O_MODEL},
        {"orientation", required_argument, NULL, O_ORIENT},
        {"enhanced", no_argument, NULL, O_ENHANCED},
        {"shuffle", no_argument, NULL, O_SHUFFLE},
        {"reverse-instances", no_argument, NULL, O_REVERSE},
        {"seed", required_argument, NULL, O_SEED},
        {"thickness", required_argument, NULL, O_THICK},
        {"prescribed", required_argument, NULL, O_PRESCRIBED},
        {"profile", required_argument, NULL, O_PROFILE},
        {"tbw", required_argument, NULL, O_TBW},
        {"pulse-ms", required_argument, NULL, O_PULSE},
        {"flip", required_argument, NULL, O_FLIP},
        {"no-refocus-profile", no_argument, NULL, O_NOREF},
        {"refocus-ratio", required_argument, NULL, O_REFRATIO},
        {"nominal-gradient", no_argument, NULL, O_NOMINAL},
        {"no-steady-state", no_argument, NULL, O_NOSS},
        {"blur", required_argument, NULL, O_BLUR},
        {"snr", required_argument, NULL, O_SNR},
        {"shading", required_argument, NULL, O_SHADING},
        {"matrix", required_argument, NULL, O_MATRIX},
        {"fov", required_argument, NULL, O_FOV},
        {"oversample", required_argument, NULL, O_OVERSAMPLE},
        {"t1", required_argument, NULL, O_T1},
        {"t2", required_argument, NULL, O_T2},
        {"offset", required_argument, NULL, O_OFFSET},
        {"rotation", required_argument, NULL, O_ROT},
        {"tilt-v", required_argument, NULL, O_TILTV},
        {"tilt-u", required_argument, NULL, O_TILTU},
        {"position-offset", required_argument, NULL, O_POFF},
        {"position-scale", required_argument, NULL, O_PSCALE},
        {"cf-offset", required_argument, NULL, O_CF},
        {"station", required_argument, NULL, O_STATION},
        {"serial", required_argument, NULL, O_SERIAL},
        {"scanner-model", required_argument, NULL, O_SCANNER},
        {"institution", required_argument, NULL, O_INST},
        {"date", required_argument, NULL, O_DATE},
        {"time", required_argument, NULL, O_TIME},
        {"field", required_argument, NULL, O_FIELD},
        {"series-number", required_argument, NULL, O_SERNUM},
        {"quiet", no_argument, NULL, O_QUIET},
        {"help", no_argument, NULL, O_HELP},
        {NULL, 0, NULL, 0},
    };
    int rc = 2, quiet = 0, c, ival = 0;
    double a = 0, b = 0;
    sim_params p;
    an_model model;
    sim_series *s = NULL;
    sw_error err;
    sim_params_default(&p);
    an_model_large(&model);
    p.model = &model;
    optind = 1;
    while ((c = getopt_long(argc, argv, "", opts, NULL)) != -1) {
        const char *o = optarg;
        int bad = 0;
        switch (c) {
        case O_SERIES:
            bad = parse_name("--series", o, series_names, 2, &ival);
            p.kind = ival;
            break;
        case O_SLICES: bad = parse_int("--slices", o, &p.n_slices); break;
        case O_MODEL:
            sw_error_clear(&err);
            if (wd_model_load(&model, o, &err) != SW_OK) {
                fprintf(stderr, "slicewarden simulate: %s\n", err.msg);
                bad = 1;
            }
            break;
        case O_ORIENT:
            bad = parse_name("--orientation", o, orient_names, 5, &ival);
            p.orientation = ival;
            break;
        case O_ENHANCED: p.enhanced = 1; break;
        case O_SHUFFLE: p.shuffle = 1; break;
        case O_REVERSE: p.reverse_instances = 1; break;
        case O_SEED: {
            char *end = NULL;
            errno = 0;
            unsigned long long v = strtoull(o, &end, 10);
            if (errno || end == o || *end || o[0] == '-') {
                fprintf(stderr, "slicewarden simulate: --seed: '%s' is not a seed\n", o);
                bad = 1;
            }
            p.seed = v;
            break;
        }
        case O_THICK: bad = parse_double("--thickness", o, &p.profile.thickness_mm); break;
        case O_PRESCRIBED: bad = parse_double("--prescribed", o, &p.prescribed_mm); break;
        case O_PROFILE:
            bad = parse_name("--profile", o, profile_names, 4, &ival);
            p.profile.kind = ival;
            break;
        case O_TBW: bad = parse_double("--tbw", o, &p.profile.tbw); break;
        case O_PULSE: bad = parse_double("--pulse-ms", o, &p.profile.duration_ms); break;
        case O_FLIP: bad = parse_double("--flip", o, &p.profile.flip_deg); break;
        case O_NOREF: p.profile.spin_echo = 0; break;
        case O_REFRATIO: bad = parse_double("--refocus-ratio", o, &p.profile.refocus_ratio); break;
        case O_NOMINAL: p.profile.nominal_gradient = 1; break;
        case O_NOSS: p.profile.steady_state = 0; break;
        case O_BLUR: bad = parse_double("--blur", o, &p.profile.blur_mm); break;
        case O_SNR: bad = parse_double("--snr", o, &p.snr); break;
        case O_SHADING: bad = parse_double("--shading", o, &p.coil_shading); break;
        case O_MATRIX: bad = parse_int("--matrix", o, &p.matrix); break;
        case O_FOV: bad = parse_double("--fov", o, &p.fov_mm); break;
        case O_OVERSAMPLE: bad = parse_int("--oversample", o, &p.oversample); break;
        case O_T1: bad = parse_double("--t1", o, &p.t1_ms); break;
        case O_T2: bad = parse_double("--t2", o, &p.t2_ms); break;
        case O_OFFSET:
            bad = parse_pair("--offset", o, &a, &b);
            p.pose.du_mm = a;
            p.pose.dv_mm = b;
            break;
        case O_ROT: bad = parse_double("--rotation", o, &p.pose.rot_deg); break;
        case O_TILTV: bad = parse_double("--tilt-v", o, &p.pose.tilt_v_deg); break;
        case O_TILTU: bad = parse_double("--tilt-u", o, &p.pose.tilt_u_deg); break;
        case O_POFF: bad = parse_double("--position-offset", o, &p.position_offset_mm); break;
        case O_PSCALE:
            bad = parse_double("--position-scale", o, &a);
            p.position_scale = a / 100.0;
            break;
        case O_CF: bad = parse_double("--cf-offset", o, &p.cf_offset_hz); break;
        case O_STATION: sw_strlcpy(p.id.station_name, o, sizeof p.id.station_name); break;
        case O_SERIAL: sw_strlcpy(p.id.device_serial, o, sizeof p.id.device_serial); break;
        case O_SCANNER: sw_strlcpy(p.id.model, o, sizeof p.id.model); break;
        case O_INST: sw_strlcpy(p.id.institution, o, sizeof p.id.institution); break;
        case O_DATE:
            if (strlen(o) != 8 || strspn(o, "0123456789") != 8) {
                fprintf(stderr, "slicewarden simulate: --date: expected YYYYMMDD, got '%s'\n", o);
                bad = 1;
            }
            sw_strlcpy(p.id.date, o, sizeof p.id.date);
            break;
        case O_TIME:
            if (strlen(o) != 6 || strspn(o, "0123456789") != 6) {
                fprintf(stderr, "slicewarden simulate: --time: expected HHMMSS, got '%s'\n", o);
                bad = 1;
            }
            sw_strlcpy(p.id.time, o, sizeof p.id.time);
            break;
        case O_FIELD: bad = parse_double("--field", o, &p.id.field_t); break;
        case O_SERNUM: bad = parse_int("--series-number", o, &p.id.series_number); break;
        case O_QUIET: quiet = 1; break;
        case O_HELP: usage(stdout); return 0;
        default: usage(stderr); return 2;
        }
        if (bad)
            return 2;
    }
    if (optind != argc - 1) {
        usage(stderr);
        return 2;
    }
    const char *dir = argv[optind];
    sw_error_clear(&err);
    if (dcm_init(&err) != SW_OK) {
        fprintf(stderr, "slicewarden simulate: %s\n", err.msg);
        goto out;
    }
    sw_error_clear(&err);
    if (sim_series_render(&p, &s, &err) != SW_OK) {
        fprintf(stderr, "slicewarden simulate: %s\n", err.msg);
        goto out;
    }
    sw_error_clear(&err);
    if (wd_mkdir_p(dir) != 0) {
        fprintf(stderr, "slicewarden simulate: %s: cannot create the folder: %s\n", dir,
                strerror(errno));
        goto out;
    }
    if (sim_series_write(s, dir, &err) != SW_OK) {
        fprintf(stderr, "slicewarden simulate: %s\n", err.msg);
        goto out;
    }
    if (!quiet)
        summary(s, dir);
    rc = 0;
out:
    sim_series_free(s);
    return rc;
}
