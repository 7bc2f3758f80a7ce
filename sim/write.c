/* write.c: a rendered series to disk: DICOM files through dicom.h and truth.json (jansson). */
#include <errno.h>
#include <fcntl.h>
#include <jansson.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "sim_int.h"

static const char *profile_kind_name(sim_profile_kind k)
{
    switch (k) {
    case SIM_PROFILE_BLOCH_SINC: return "bloch-sinc";
    case SIM_PROFILE_RECT: return "rect";
    case SIM_PROFILE_GAUSS: return "gauss";
    case SIM_PROFILE_RECT_GAUSS: return "rect-gauss";
    }
    return "unknown";
}

static const char *orientation_name(sim_orientation o)
{
    switch (o) {
    case SIM_ORIENT_STANDARD: return "standard";
    case SIM_ORIENT_FLIP_ROWS: return "flip-rows";
    case SIM_ORIENT_FLIP_COLUMNS: return "flip-columns";
    case SIM_ORIENT_TRANSPOSED: return "transposed";
    case SIM_ORIENT_FEET_FIRST: return "feet-first";
    }
    return "unknown";
}

/* json_pack with jansson's "f" needs finite numbers: NAN becomes null. */
static json_t *num(double v)
{
    return isfinite(v) ? json_real(v) : json_null();
}

static int put(json_t *o, const char *k, json_t *v)
{
    return v ? json_object_set_new(o, k, v) : -1;
}

char *sim_truth_json(const sim_series *s)
{
    const sim_params *p = &s->params;
    const sim_truth *t = &s->truth;
    char *text = NULL;
    int bad = 0;
    json_t *root = json_object();
    if (!root)
        return NULL;
    char seed[32];
    snprintf(seed, sizeof seed, "%llu", (unsigned long long)p->seed);
    bad |= put(root, "generator", json_string("slicewarden simulator " SW_VERSION));
    bad |= put(root, "seed", json_string(seed)); /* a string: 64-bit values exceed JSON's doubles */
    bad |= put(root, "model", json_string(s->model.name));
    bad |= put(root, "series_kind", json_string(p->kind == SIM_SERIES_T2 ? "t2" : "t1"));
    bad |= put(root, "series_instance_uid",
               json_string(s->n_images > 0 ? s->images[0].series_instance_uid : ""));
    bad |= put(root, "orientation", json_string(orientation_name(p->orientation)));
    bad |= put(root, "patient_position",
               json_string(p->orientation == SIM_ORIENT_FEET_FIRST ? "FFS" : "HFS"));
    bad |= put(root, "enhanced", json_boolean(p->enhanced));

    json_t *pr = json_object();
    bad |= put(root, "profile", pr);
    if (pr) {
        bad |= put(pr, "kind", json_string(profile_kind_name(p->profile.kind)));
        bad |= put(pr, "requested_thickness_mm", num(p->profile.thickness_mm));
        bad |= put(pr, "time_bandwidth", num(p->profile.tbw));
        bad |= put(pr, "duration_ms", num(p->profile.duration_ms));
        bad |= put(pr, "flip_deg", num(p->profile.flip_deg));
        bad |= put(pr, "spin_echo", json_boolean(p->profile.spin_echo));
        bad |= put(pr, "refocus_ratio",
                   num(p->profile.refocus_ratio > 0 ? p->profile.refocus_ratio : 1.0));
        bad |= put(pr, "nominal_gradient", json_boolean(p->profile.nominal_gradient));
        bad |= put(pr, "steady_state", json_boolean(p->profile.steady_state));
        bad |= put(pr, "blur_mm", num(p->profile.blur_mm));
        bad |= put(pr, "gradient_mT_per_m", num(t->gradient_mt_per_m));
        bad |= put(pr, "bandwidth_hz", num(t->bandwidth_hz));
        bad |= put(pr, "nominal_thickness_mm", num(t->nominal_thickness_mm));
    }
    json_t *seq = json_object();
    bad |= put(root, "sequence", seq);
    if (seq) {
        bad |= put(seq, "tr_ms", num(p->tr_ms));
        bad |= put(seq, "t1_ms", num(p->t1_ms));
        bad |= put(seq, "t2_ms", num(p->t2_ms));
        bad |= put(seq, "matrix", json_integer(p->matrix));
        bad |= put(seq, "fov_mm", num(p->fov_mm));
        bad |= put(seq, "oversample", json_integer(p->oversample));
        bad |= put(seq, "slices", json_integer(t->n_slices));
        bad |= put(seq, "gap_mm", num(p->gap_mm));
        bad |= put(seq, "readout_bw_hz_per_px", num(p->readout_bw_hz_per_px));
    }
    json_t *echoes = json_array();
    bad |= put(root, "echoes", echoes);
    for (int e = 0; echoes && e < t->n_echoes; e++) {
        json_t *o = json_object();
        if (!o || json_array_append_new(echoes, o) != 0) {
            bad = 1;
            break;
        }
        bad |= put(o, "echo_number", json_integer(e + 1));
        bad |= put(o, "te_ms", num(p->te_ms[e]));
        bad |= put(o, "thickness_fwhm_mm", num(t->thickness_mm[e]));
        bad |= put(o, "thickness_fwtm_mm", num(t->fwtm_mm[e]));
        bad |= put(o, "profile_centre_mm", num(t->profile_centre_mm[e]));
        bad |= put(o, "fluid_signal", num(t->fluid_signal[e]));
        bad |= put(o, "snr", num(t->noise_sigma > 0 ? t->fluid_signal[e] / t->noise_sigma : NAN));
        if (t->has_ramps) {
            json_t *r = json_object();
            bad |= put(o, "ramps", r);
            if (r) {
                bad |= put(r, "slice", json_integer(t->ramp_ordinal));
                bad |= put(r, "top_length_mm", num(t->ramp[e].length_mm[0]));
                bad |= put(r, "top_centre_u_mm", num(t->ramp[e].centre_u_mm[0]));
                if (s->model.n_ramps > 1) {
                    bad |= put(r, "bottom_length_mm", num(t->ramp[e].length_mm[1]));
                    bad |= put(r, "bottom_centre_u_mm", num(t->ramp[e].centre_u_mm[1]));
                }
            }
        }
    }
    json_t *pose = json_object();
    bad |= put(root, "pose", pose);
    if (pose) {
        bad |= put(pose, "du_mm", num(p->pose.du_mm));
        bad |= put(pose, "dv_mm", num(p->pose.dv_mm));
        bad |= put(pose, "rotation_deg", num(p->pose.rot_deg));
        bad |= put(pose, "tilt_v_deg", num(p->pose.tilt_v_deg));
        bad |= put(pose, "tilt_u_deg", num(p->pose.tilt_u_deg));
    }
    json_t *pe = json_object();
    bad |= put(root, "position_error", pe);
    if (pe) {
        bad |= put(pe, "offset_mm", num(p->position_offset_mm));
        bad |= put(pe, "scale", num(p->position_scale));
        bad |= put(pe, "centre_z_mm", num(p->centre_z_mm));
        bad |= put(pe, "cf_offset_hz", num(p->cf_offset_hz));
        bad |= put(pe, "cf_shift_mm", num(t->cf_shift_mm));
        bad |= put(pe, "cf_shift_x_mm", num(t->cf_shift_x_mm));
    }
    json_t *noise = json_object();
    bad |= put(root, "noise", noise);
    if (noise) {
        bad |= put(noise, "snr", num(t->snr));
        bad |= put(noise, "sigma", num(t->noise_sigma));
        bad |= put(noise, "gain", num(t->gain));
        bad |= put(noise, "coil_shading", num(p->coil_shading));
    }
    json_t *slices = json_array();
    bad |= put(root, "slices", slices);
    for (int k = 0; slices && k < t->n_slices; k++) {
        json_t *o = json_object();
        if (!o || json_array_append_new(slices, o) != 0) {
            bad = 1;
            break;
        }
        bad |= put(o, "ordinal", json_integer(k + 1));
        bad |= put(o, "z_mm", num(t->z_mm[k]));
        bad |= put(o, "error_mm", num(t->error_mm[k]));
        bad |= put(o, "displacement_mm", num(t->displacement_mm[k]));
    }
    if (t->has_wedges) {
        json_t *w = json_array();
        bad |= put(root, "wedges", w);
        for (int j = 0; w && j < 2; j++) {
            if (t->wedge[j].ordinal == 0)
                continue; /* this wedge slice is not in the series */
            json_t *o = json_object();
            if (!o || json_array_append_new(w, o) != 0) {
                bad = 1;
                break;
            }
            bad |= put(o, "slice", json_integer(t->wedge[j].ordinal));
            bad |= put(o, "bar_left_mm", num(t->wedge[j].left_mm));
            bad |= put(o, "bar_right_mm", num(t->wedge[j].right_mm));
            bad |= put(o, "bar_difference_mm", num(t->wedge[j].difference_mm));
        }
    }
    json_t *files = json_array();
    bad |= put(root, "files", files);
    for (int i = 0; files && i < s->n_images; i++) {
        json_t *o = json_object();
        if (!o || json_array_append_new(files, o) != 0) {
            bad = 1;
            break;
        }
        bad |= put(o, "name", json_string(s->file_name[i]));
        bad |= put(o, "slice", json_integer(s->slice[i]));
        bad |= put(o, "echo", json_integer(s->echo[i]));
        bad |= put(o, "instance", json_integer(s->images[i].instance_number));
        if (s->params.enhanced)
            bad |= put(o, "frame", json_integer(s->images[i].frame));
        bad |= put(o, "sop_instance_uid", json_string(s->images[i].sop_instance_uid));
    }
    if (!bad)
        text = json_dumps(root, JSON_INDENT(2) | JSON_PRESERVE_ORDER | JSON_REAL_PRECISION(10));
    json_decref(root);
    return text;
}

/* Writes text to dir/name through a temporary file, fsync and rename. */
static sw_status write_atomic(const char *dir, const char *name, const char *text, sw_error *err)
{
    sw_status st = SW_OK;
    char path[4096], tmp[4096];
    int fd = -1;
    if (snprintf(path, sizeof path, "%s/%s", dir, name) >= (int)sizeof path ||
        snprintf(tmp, sizeof tmp, "%s/.%s.tmp", dir, name) >= (int)sizeof tmp)
        return sw_error_set(err, SW_EINVAL, "simulator: %s: path too long", dir);
    fd = open(tmp, O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0644);
    if (fd < 0) {
        st = sw_error_set(err, SW_EIO, "simulator: %s: %s", tmp, strerror(errno));
        goto out;
    }
    size_t len = strlen(text), off = 0;
    while (off < len) {
        ssize_t k = write(fd, text + off, len - off);
        if (k < 0) {
            if (errno == EINTR)
                continue;
            st = sw_error_set(err, SW_EIO, "simulator: %s: %s", tmp, strerror(errno));
            goto out;
        }
        off += (size_t)k;
    }
    if (fsync(fd) != 0) {
        st = sw_error_set(err, SW_EIO, "simulator: %s: %s", tmp, strerror(errno));
        goto out;
    }
    if (close(fd) != 0) {
        fd = -1;
        st = sw_error_set(err, SW_EIO, "simulator: %s: %s", tmp, strerror(errno));
        goto out;
    }
    fd = -1;
    if (rename(tmp, path) != 0)
        st = sw_error_set(err, SW_EIO, "simulator: %s: %s", path, strerror(errno));
out:
    if (fd >= 0)
        close(fd);
    if (st != SW_OK)
        unlink(tmp);
    return st;
}

sw_status sim_series_write(const sim_series *s, const char *dir, sw_error *err)
{
    sw_status st = SW_OK;
    char *text = NULL;
    char path[4096];
    if (!s || !dir || !dir[0])
        return sw_error_set(err, SW_EINVAL, "simulator: NULL argument");
    if (mkdir(dir, 0755) != 0 && errno != EEXIST)
        return sw_error_set(err, SW_EIO, "simulator: %s: %s", dir, strerror(errno));
    if (snprintf(path, sizeof path, "%s/truth.json", dir) >= (int)sizeof path)
        return sw_error_set(err, SW_EINVAL, "simulator: %s: path too long", dir);
    if (access(path, F_OK) == 0)
        return sw_error_set(err, SW_EINVAL, "simulator: %s already holds a simulated series", dir);
    unsigned flags = s->params.scratch ? DCM_WRITE_NOSYNC : 0;
    if (s->params.enhanced) {
        if (snprintf(path, sizeof path, "%s/%s", dir, s->file_name[0]) >= (int)sizeof path)
            return sw_error_set(err, SW_EINVAL, "simulator: %s: path too long", dir);
        st = dcm_write_enhanced_mr_flags(path, s->images, s->n_images, flags, err);
        if (st != SW_OK)
            goto out;
    } else {
        for (int i = 0; i < s->n_images; i++) {
            if (snprintf(path, sizeof path, "%s/%s", dir, s->file_name[i]) >= (int)sizeof path) {
                st = sw_error_set(err, SW_EINVAL, "simulator: %s: path too long", dir);
                goto out;
            }
            st = dcm_write_mr_flags(path, &s->images[i], flags, err);
            if (st != SW_OK)
                goto out;
        }
    }
    text = sim_truth_json(s);
    if (!text) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: cannot build truth.json");
        goto out;
    }
    st = write_atomic(dir, "truth.json", text, err);
out:
    free(text);
    return st;
}
