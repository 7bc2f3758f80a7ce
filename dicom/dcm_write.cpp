/* dcm_write.cpp: dcm_image -> MR Image Storage and Enhanced MR Image Storage files (the
 * simulator's output), explicit VR little endian, written atomically. */
#include "dcm_internal.h"

#include <cerrno>
#include <climits>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <ctime>
#include <fcntl.h>
#include <new>
#include <string>
#include <sys/stat.h>
#include <unistd.h>
#include <vector>

#include <dcmtk/config/osconfig.h>
#include <dcmtk/dcmdata/dcdeftag.h>
#include <dcmtk/dcmdata/dcfilefo.h>
#include <dcmtk/dcmdata/dcmetinf.h>
#include <dcmtk/dcmdata/dcuid.h>
#include <dcmtk/dcmdata/dcvrui.h>

#define MR_IMAGE_STORAGE "1.2.840.10008.5.1.4.1.1.4"
#define ENHANCED_MR_IMAGE_STORAGE "1.2.840.10008.5.1.4.1.1.4.1"
#define STORED_MAX 4095 /* BitsStored 12 */

namespace
{

/* Maximum value length in characters, PS3.5 Table 6.2-1 (PN: per component group). 0: no
 * check here. */
size_t vr_max_chars(DcmEVR vr)
{
    switch (vr) {
    case EVR_AE: return 16;
    case EVR_AS: return 4;
    case EVR_CS: return 16;
    case EVR_DA: return 8;
    case EVR_DS: return 16;
    case EVR_DT: return 26;
    case EVR_IS: return 12;
    case EVR_LO: return 64;
    case EVR_PN: return 64;
    case EVR_SH: return 16;
    case EVR_TM: return 14;
    case EVR_UI: return 64;
    default: return 0;
    }
}

/* Length in characters (UTF-8 code points) of the longest of the '\'-separated values (for PN, of
 * the '='-separated component groups). */
size_t longest_value(const char *s, bool pn)
{
    size_t best = 0, cur = 0;
    for (const unsigned char *p = reinterpret_cast<const unsigned char *>(s); *p; p++) {
        if (*p == '\\' || (pn && *p == '=')) {
            cur = 0;
            continue;
        }
        if ((*p & 0xC0) != 0x80)
            cur++;
        if (cur > best)
            best = cur;
    }
    return best;
}

/* The writer's state for one file: the first failure wins and stops further puts. */
struct W {
    const char *name;
    sw_error *err;
    sw_status st;
    unsigned flags; /* DCM_WRITE_* */

    bool ok() const
    {
        return st == SW_OK;
    }

    sw_status fail(sw_status s, const char *fmt, ...) __attribute__((format(printf, 3, 4)))
    {
        if (st != SW_OK)
            return st;
        char reason[SW_ERROR_MAX];
        va_list ap;
        va_start(ap, fmt);
        vsnprintf(reason, sizeof reason, fmt, ap);
        va_end(ap);
        st = dcm_fail(err, s, name, "%s", reason);
        return st;
    }

    /* A string attribute (empty allowed: type 2), checked against its VR and VM. */
    void put(DcmItem *it, const DcmTagKey &tag, const char *val, const char *vm = "1-n")
    {
        if (!ok())
            return;
        DcmTag t(tag);
        OFCondition c = it->putAndInsertString(t, val ? val : "");
        DcmElement *e = nullptr;
        if (c.good())
            c = it->findAndGetElement(tag, e);
        if (c.good() && e && val && *val)
            c = e->checkValue(vm);
        if (c.bad()) {
            fail(SW_EINVAL, "bad value '%.64s' for %s: %s", val ? val : "", t.getTagName(),
                 c.text());
            return;
        }
        size_t maxlen = vr_max_chars(t.getEVR());
        if (maxlen && val && longest_value(val, t.getEVR() == EVR_PN) > maxlen)
            fail(SW_EINVAL, "value '%.64s' for %s is longer than %zu characters", val,
                 t.getTagName(), maxlen);
    }
    /* Type 3: only when there is a value. */
    void put_opt(DcmItem *it, const DcmTagKey &tag, const char *val, const char *vm = "1-n")
    {
        if (val && *val)
            put(it, tag, val, vm);
    }
    void put_ds(DcmItem *it, const DcmTagKey &tag, const double *v, int n);
    /* Type 2 number: empty when not finite. */
    void put_ds2(DcmItem *it, const DcmTagKey &tag, double v)
    {
        if (std::isfinite(v))
            put_ds(it, tag, &v, 1);
        else
            put(it, tag, "");
    }
    void put_ds3(DcmItem *it, const DcmTagKey &tag, double v)
    {
        if (std::isfinite(v))
            put_ds(it, tag, &v, 1);
    }
    void put_int(DcmItem *it, const DcmTagKey &tag, long v)
    {
        char b[24];
        snprintf(b, sizeof b, "%ld", v);
        put(it, tag, b);
    }
    void put_fd(DcmItem *it, const DcmTagKey &tag, double v)
    {
        if (ok() && it->putAndInsertFloat64(tag, v).bad())
            fail(SW_ENOMEM, "cannot add %s", DcmTag(tag).getTagName());
    }
    void put_us(DcmItem *it, const DcmTagKey &tag, Uint16 v)
    {
        if (ok() && it->putAndInsertUint16(tag, v).bad())
            fail(SW_ENOMEM, "cannot add %s", DcmTag(tag).getTagName());
    }
    void put_ul(DcmItem *it, const DcmTagKey &tag, const Uint32 *v, unsigned long n)
    {
        if (ok() && it->putAndInsertUint32Array(tag, v, n).bad())
            fail(SW_ENOMEM, "cannot add %s", DcmTag(tag).getTagName());
    }
    void put_at(DcmItem *it, const DcmTagKey &tag, const DcmTagKey &val)
    {
        if (ok() && it->putAndInsertTagKey(tag, val).bad())
            fail(SW_ENOMEM, "cannot add %s", DcmTag(tag).getTagName());
    }
    /* An empty sequence (type 2). */
    void put_empty_seq(DcmItem *it, const DcmTagKey &tag)
    {
        if (ok() && it->insertEmptyElement(tag).bad())
            fail(SW_ENOMEM, "cannot add %s", DcmTag(tag).getTagName());
    }
    /* A new item appended to sequence `tag` of `it`; NULL after a failure. */
    DcmItem *item(DcmItem *it, const DcmTagKey &tag)
    {
        if (!ok())
            return nullptr;
        DcmItem *n = nullptr;
        if (it->findOrCreateSequenceItem(tag, n, -2).bad() || !n) {
            fail(SW_ENOMEM, "cannot add %s", DcmTag(tag).getTagName());
            return nullptr;
        }
        return n;
    }
    /* A code sequence item (Code Sequence Macro, basic coded entry). */
    void code(DcmItem *it, const DcmTagKey &seq, const char *value, const char *scheme,
              const char *meaning)
    {
        DcmItem *c = item(it, seq);
        if (!c)
            return;
        put(c, DCM_CodeValue, value);
        put(c, DCM_CodingSchemeDesignator, scheme);
        put(c, DCM_CodeMeaning, meaning);
    }
};

/* Decimal String: at most 16 characters, the most precise "%g" form that fits. */
void format_ds(double v, char out[17])
{
    for (int prec = 16; prec > 0; prec--) {
        char b[40];
        snprintf(b, sizeof b, "%.*g", prec, v);
        if (strlen(b) <= 16) {
            memcpy(out, b, strlen(b) + 1);
            return;
        }
    }
    snprintf(out, 17, "%.0e", v);
}

void W::put_ds(DcmItem *it, const DcmTagKey &tag, const double *v, int n)
{
    if (!ok())
        return;
    std::string s;
    for (int i = 0; i < n; i++) {
        if (!std::isfinite(v[i])) {
            fail(SW_EINVAL, "%s is not a finite number", DcmTag(tag).getTagName());
            return;
        }
        char b[17];
        format_ds(v[i], b);
        if (i)
            s += '\\';
        s += b;
    }
    put(it, tag, s.c_str());
}

bool has_non_ascii(const char *s)
{
    for (; *s; s++)
        if (static_cast<unsigned char>(*s) >= 0x80)
            return true;
    return false;
}

/* Today's date and time, for type 1 dates the caller left empty. */
void now(char date[9], char time[17])
{
    time_t t = ::time(nullptr);
    struct tm tm;
    localtime_r(&t, &tm);
    strftime(date, 9, "%Y%m%d", &tm);
    strftime(time, 17, "%H%M%S", &tm);
}

/* The UIDs that name the written object: the caller's, checked, or new ones. */
struct Uids {
    char study[DCM_UID_MAX], series[DCM_UID_MAX], frame_of_ref[DCM_UID_MAX], sop[DCM_UID_MAX];
};

bool uid_valid(const char *u)
{
    return DcmUniqueIdentifier::checkStringValue(OFString(u), "1").good() && strlen(u) <= 64;
}

sw_status pick_uids(W &w, const dcm_image *img, Uids *u)
{
    struct {
        const char *given;
        char *dst;
        const char *label;
    } list[] = {
        {img->study_instance_uid, u->study, "StudyInstanceUID"},
        {img->series_instance_uid, u->series, "SeriesInstanceUID"},
        {img->frame_of_reference_uid, u->frame_of_ref, "FrameOfReferenceUID"},
        {img->sop_instance_uid, u->sop, "SOPInstanceUID"},
    };
    for (auto &x : list) {
        if (x.given[0]) {
            if (!uid_valid(x.given))
                return w.fail(SW_EINVAL, "%s '%.64s' is not a valid UID", x.label, x.given);
            sw_strlcpy(x.dst, x.given, DCM_UID_MAX);
        } else {
            dcm_new_uid(x.dst, nullptr);
        }
    }
    return SW_OK;
}

/* Geometry and size checks shared by both writers. */
sw_status check_image(W &w, const dcm_image *im, int idx)
{
    if (im->rows < 1 || im->columns < 1 || im->rows > 65535 || im->columns > 65535)
        return w.fail(SW_EINVAL, "frame %d: bad size %d x %d", idx, im->columns, im->rows);
    if (!im->pixels)
        return w.fail(SW_EINVAL, "frame %d: no pixels", idx);
    for (int i = 0; i < 3; i++)
        if (!std::isfinite(im->ipp[i]))
            return w.fail(SW_EINVAL, "frame %d: ImagePositionPatient is required", idx);
    for (int i = 0; i < 6; i++)
        if (!std::isfinite(im->iop[i]))
            return w.fail(SW_EINVAL, "frame %d: ImageOrientationPatient is required", idx);
    const double *r = im->iop, *c = im->iop + 3;
    double nr = std::sqrt(r[0] * r[0] + r[1] * r[1] + r[2] * r[2]);
    double nc = std::sqrt(c[0] * c[0] + c[1] * c[1] + c[2] * c[2]);
    double dot = r[0] * c[0] + r[1] * c[1] + r[2] * c[2];
    if (std::fabs(nr - 1) > 1e-4 || std::fabs(nc - 1) > 1e-4 || std::fabs(dot) > 1e-4)
        return w.fail(SW_EINVAL,
                      "frame %d: ImageOrientationPatient is not two orthogonal unit vectors", idx);
    for (int i = 0; i < 2; i++)
        if (!std::isfinite(im->pixel_spacing[i]) || im->pixel_spacing[i] <= 0)
            return w.fail(SW_EINVAL, "frame %d: PixelSpacing must be positive", idx);
    return SW_OK;
}

/* Floats -> 12-bit stored values: round((v - intercept) / slope), clamped to 0..4095. */
sw_status to_stored(W &w, const dcm_image *im, double slope, double icept, Uint16 *dst, size_t npix,
                    int idx)
{
    for (size_t k = 0; k < npix; k++) {
        double v = im->pixels[k];
        if (!std::isfinite(v))
            return w.fail(SW_EINVAL, "frame %d: pixel %zu is not a finite number", idx, k);
        double s = std::nearbyint((v - icept) / slope);
        if (s < 0)
            s = 0;
        if (s > STORED_MAX)
            s = STORED_MAX;
        dst[k] = static_cast<Uint16>(s);
    }
    return SW_OK;
}

/* Patient, General Study, General Series, Frame of Reference, General Equipment, SOP Common and
 * the acquisition attributes both IODs share. */
void put_common(W &w, DcmDataset *ds, const dcm_image *im, const Uids &u, const char *sop_class)
{
    const char *texts[] = {im->patient_name,       im->patient_id,    im->station_name,
                           im->manufacturer,       im->model,         im->institution,
                           im->series_description, im->protocol_name, im->device_serial,
                           im->software_versions,  im->receive_coil};
    bool utf8 = false;
    for (const char *t : texts)
        if (has_non_ascii(t))
            utf8 = true;
    if (utf8)
        w.put(ds, DCM_SpecificCharacterSet, "ISO_IR 192");
    /* SOP Common */
    w.put(ds, DCM_SOPClassUID, sop_class);
    w.put(ds, DCM_SOPInstanceUID, u.sop);
    /* Patient */
    w.put(ds, DCM_PatientName, im->patient_name);
    w.put(ds, DCM_PatientID, im->patient_id);
    w.put(ds, DCM_PatientBirthDate, "");
    w.put(ds, DCM_PatientSex, "");
    /* General Study */
    w.put(ds, DCM_StudyInstanceUID, u.study);
    w.put(ds, DCM_StudyDate, im->study_date);
    w.put(ds, DCM_StudyTime, im->study_time);
    w.put(ds, DCM_ReferringPhysicianName, "");
    w.put(ds, DCM_StudyID, "");
    w.put(ds, DCM_AccessionNumber, "");
    /* General Series */
    w.put(ds, DCM_Modality, "MR");
    w.put(ds, DCM_SeriesInstanceUID, u.series);
    if (im->series_number > 0)
        w.put_int(ds, DCM_SeriesNumber, im->series_number);
    else
        w.put(ds, DCM_SeriesNumber, "");
    w.put_opt(ds, DCM_SeriesDate, im->series_date);
    w.put_opt(ds, DCM_SeriesTime, im->series_time);
    w.put_opt(ds, DCM_SeriesDescription, im->series_description);
    w.put_opt(ds, DCM_ProtocolName, im->protocol_name);
    w.put(ds, DCM_PatientPosition, im->patient_position[0] ? im->patient_position : "HFS");
    /* The large phantom is scanned in the head coil as a head; naming the (unpaired) body part
     * also settles whether Laterality is needed. */
    w.put(ds, DCM_BodyPartExamined, "HEAD");
    /* Frame of Reference */
    w.put(ds, DCM_FrameOfReferenceUID, u.frame_of_ref);
    w.put(ds, DCM_PositionReferenceIndicator, "");
    /* General Equipment */
    w.put_opt(ds, DCM_InstitutionName, im->institution);
    w.put_opt(ds, DCM_StationName, im->station_name);
    /* Acquisition */
    if (im->acquisition_number > 0)
        w.put_int(ds, DCM_AcquisitionNumber, im->acquisition_number);
    w.put_ds3(ds, DCM_MagneticFieldStrength, im->magnetic_field_t);
}

/* Image Pixel module for 12-bit unsigned monochrome data. */
void put_pixel_module(W &w, DcmDataset *ds, int rows, int cols)
{
    w.put_us(ds, DCM_SamplesPerPixel, 1);
    w.put(ds, DCM_PhotometricInterpretation, "MONOCHROME2");
    w.put_us(ds, DCM_Rows, static_cast<Uint16>(rows));
    w.put_us(ds, DCM_Columns, static_cast<Uint16>(cols));
    w.put_us(ds, DCM_BitsAllocated, 16);
    w.put_us(ds, DCM_BitsStored, 12);
    w.put_us(ds, DCM_HighBit, 11);
    w.put_us(ds, DCM_PixelRepresentation, 0);
}

/* The process umask, read without changing it (umask(2) would race with other threads). */
mode_t current_umask(void)
{
    mode_t m = 022;
    FILE *fp = fopen("/proc/self/status", "r");
    if (!fp)
        return m;
    char line[256];
    while (fgets(line, sizeof line, fp))
        if (strncmp(line, "Umask:", 6) == 0) {
            m = static_cast<mode_t>(strtoul(line + 6, nullptr, 8)) & 0777;
            break;
        }
    fclose(fp);
    return m;
}

/* The file meta information (PS3.10 7.1) with our implementation class UID and version name:
 * DCMTK fills it in and would put its own names there, so ours replace them afterwards and the
 * group length is counted again. The file is then saved without touching the meta header. */
OFCondition set_meta(DcmFileFormat &ff)
{
    OFCondition c = ff.validateMetaInfo(EXS_LittleEndianExplicit, EWM_createNewMeta);
    DcmMetaInfo *meta = ff.getMetaInfo();
    if (c.good())
        c = meta->putAndInsertString(DCM_ImplementationClassUID, DCM_IMPLEMENTATION_CLASS_UID);
    if (c.good())
        c = meta->putAndInsertString(DCM_ImplementationVersionName, DCM_IMPLEMENTATION_VERSION);
    if (c.bad())
        return c;
    Uint32 len = 0;
    for (unsigned long i = 0; i < meta->card(); i++) {
        DcmElement *e = meta->getElement(i);
        if (e->getTag() != DCM_FileMetaInformationGroupLength)
            len += e->calcElementLength(EXS_LittleEndianExplicit, EET_ExplicitLength);
    }
    return meta->putAndInsertUint32(DCM_FileMetaInformationGroupLength, len);
}

/* Saves to a hidden temporary file beside path, syncs it, then renames it into place, so that a
 * watcher never sees a partial file under the final name. */
sw_status save_atomic(W &w, DcmFileFormat &ff, const char *path)
{
    sw_status st = SW_OK;
    std::string p(path), dir, base;
    size_t slash = p.rfind('/');
    if (slash == std::string::npos) {
        dir = ".";
        base = p;
    } else {
        dir = slash == 0 ? "/" : p.substr(0, slash);
        base = p.substr(slash + 1);
    }
    if (base.empty())
        return w.fail(SW_EINVAL, "no file name");
    std::string tmp = dir + "/." + base + ".XXXXXX";
    std::vector<char> tbuf(tmp.begin(), tmp.end());
    tbuf.push_back('\0');
    int fd = mkstemp(tbuf.data());
    if (fd < 0)
        return w.fail(SW_EIO, "cannot create a temporary file in %s: %s", dir.c_str(),
                      strerror(errno));
    /* mkstemp creates 0600; give the file the mode an ordinary create would. */
    (void)fchmod(fd, 0666 & ~current_umask());
    close(fd);
    fd = -1;
    OFCondition c = set_meta(ff);
    if (c.good())
        c = ff.saveFile(tbuf.data(), EXS_LittleEndianExplicit, EET_ExplicitLength, EGL_recalcGL,
                        EPD_noChange, 0, 0, EWM_dontUpdateMeta);
    if (c.bad()) {
        st = w.fail(SW_EIO, "cannot write: %s", c.text());
        goto out;
    }
    if (!(w.flags & DCM_WRITE_NOSYNC)) {
        fd = open(tbuf.data(), O_RDONLY | O_CLOEXEC);
        if (fd < 0 || fsync(fd) != 0) {
            st = w.fail(SW_EIO, "cannot sync the temporary file: %s", strerror(errno));
            goto out;
        }
    }
    if (rename(tbuf.data(), path) != 0) {
        st = w.fail(SW_EIO, "cannot rename the temporary file into place: %s", strerror(errno));
        goto out;
    }
    if (!(w.flags & DCM_WRITE_NOSYNC)) {
        int dfd = open(dir.c_str(), O_RDONLY | O_DIRECTORY | O_CLOEXEC);
        if (dfd >= 0) {
            (void)fsync(dfd); /* best effort: the data itself is synced */
            close(dfd);
        }
    }
out:
    if (fd >= 0)
        close(fd);
    if (st != SW_OK)
        unlink(tbuf.data());
    return st;
}

const char *or_default(const char *s, const char *dflt)
{
    return s && *s ? s : dflt;
}

sw_status write_mr(W &w, const char *path, const dcm_image *im)
{
    size_t npix;
    Uids u;
    if (check_image(w, im, 1) != SW_OK)
        return w.st;
    if (sw_mul_size(static_cast<size_t>(im->rows), static_cast<size_t>(im->columns), &npix))
        return w.fail(SW_EINVAL, "image size overflows");
    if (pick_uids(w, im, &u) != SW_OK)
        return w.st;
    std::vector<Uint16> stored(npix);
    if (to_stored(w, im, 1.0, 0.0, stored.data(), npix, 1) != SW_OK)
        return w.st;

    DcmFileFormat ff;
    DcmDataset *ds = ff.getDataset();
    put_common(w, ds, im, u, MR_IMAGE_STORAGE);
    /* General Equipment (Manufacturer is type 2) */
    w.put(ds, DCM_Manufacturer, im->manufacturer);
    w.put_opt(ds, DCM_ManufacturerModelName, im->model);
    w.put_opt(ds, DCM_DeviceSerialNumber, im->device_serial);
    w.put_opt(ds, DCM_SoftwareVersions, im->software_versions);
    /* General Acquisition and General Image */
    w.put_opt(ds, DCM_AcquisitionDate, im->acquisition_date);
    w.put_opt(ds, DCM_AcquisitionTime, im->acquisition_time);
    if (im->instance_number > 0)
        w.put_int(ds, DCM_InstanceNumber, im->instance_number);
    else
        w.put(ds, DCM_InstanceNumber, "");
    w.put(ds, DCM_ContentDate, im->content_date);
    w.put(ds, DCM_ContentTime, im->content_time);
    w.put(ds, DCM_ImageType, or_default(im->image_type, "ORIGINAL\\PRIMARY\\OTHER"));
    /* Image Plane */
    w.put_ds(ds, DCM_PixelSpacing, im->pixel_spacing, 2);
    w.put_ds(ds, DCM_ImageOrientationPatient, im->iop, 6);
    w.put_ds(ds, DCM_ImagePositionPatient, im->ipp, 3);
    w.put_ds2(ds, DCM_SliceThickness, im->slice_thickness_mm);
    w.put_ds3(ds, DCM_SpacingBetweenSlices, im->spacing_between_slices_mm);
    /* MR Image */
    w.put(ds, DCM_ScanningSequence, or_default(im->scanning_sequence, "SE"));
    w.put(ds, DCM_SequenceVariant, or_default(im->sequence_variant, "NONE"));
    w.put(ds, DCM_ScanOptions, "");
    w.put(ds, DCM_MRAcquisitionType, or_default(im->mr_acquisition_type, "2D"));
    w.put_ds2(ds, DCM_RepetitionTime, im->repetition_time_ms);
    w.put_ds2(ds, DCM_EchoTime, im->echo_time_ms);
    w.put(ds, DCM_EchoTrainLength, "");
    w.put_ds3(ds, DCM_ImagingFrequency, im->imaging_frequency_mhz);
    w.put(ds, DCM_ImagedNucleus, "1H");
    if (im->echo_number > 0)
        w.put_int(ds, DCM_EchoNumbers, im->echo_number);
    w.put_ds3(ds, DCM_FlipAngle, im->flip_angle_deg);
    if (im->pixel_bandwidth_hz > 0)
        w.put_ds3(ds, DCM_PixelBandwidth, im->pixel_bandwidth_hz);
    w.put_opt(ds, DCM_ReceiveCoilName, im->receive_coil);
    /* Image Pixel */
    put_pixel_module(w, ds, im->rows, im->columns);
    if (w.ok() && npix > ULONG_MAX / 2)
        return w.fail(SW_EINVAL, "image too large");
    if (w.ok() &&
        ds->putAndInsertUint16Array(DCM_PixelData, stored.data(), static_cast<unsigned long>(npix))
            .bad())
        return w.fail(SW_ENOMEM, "cannot add the pixel data");
    if (!w.ok())
        return w.st;
    return save_atomic(w, ff, path);
}

/* Enhanced MR helpers -------------------------------------------------------------------- */

bool same(double a, double b)
{
    return a == b || (std::isnan(a) && std::isnan(b));
}

bool same_orientation(const dcm_image *f, int n)
{
    for (int i = 1; i < n; i++)
        for (int k = 0; k < 6; k++)
            if (!same(f[i].iop[k], f[0].iop[k]))
                return false;
    return true;
}

bool same_measures(const dcm_image *f, int n)
{
    for (int i = 1; i < n; i++)
        if (!same(f[i].pixel_spacing[0], f[0].pixel_spacing[0]) ||
            !same(f[i].pixel_spacing[1], f[0].pixel_spacing[1]) ||
            !same(f[i].slice_thickness_mm, f[0].slice_thickness_mm) ||
            !same(f[i].spacing_between_slices_mm, f[0].spacing_between_slices_mm))
            return false;
    return true;
}

/* The rescale written for a frame: the caller's when usable, else the identity. */
void frame_rescale(const dcm_image *im, double *slope, double *icept)
{
    bool ok = std::isfinite(im->rescale_slope) && im->rescale_slope != 0.0 &&
              std::isfinite(im->rescale_intercept);
    *slope = ok ? im->rescale_slope : 1.0;
    *icept = ok ? im->rescale_intercept : 0.0;
}

bool same_rescale(const dcm_image *f, int n)
{
    double m0, b0, m, b;
    frame_rescale(&f[0], &m0, &b0);
    for (int i = 1; i < n; i++) {
        frame_rescale(&f[i], &m, &b);
        if (m != m0 || b != b0)
            return false;
    }
    return true;
}

bool same_timing(const dcm_image *f, int n)
{
    for (int i = 1; i < n; i++)
        if (!same(f[i].repetition_time_ms, f[0].repetition_time_ms) ||
            !same(f[i].flip_angle_deg, f[0].flip_angle_deg))
            return false;
    return true;
}

void put_orientation(W &w, DcmItem *fg, const dcm_image *im)
{
    DcmItem *it = w.item(fg, DCM_PlaneOrientationSequence);
    if (it)
        w.put_ds(it, DCM_ImageOrientationPatient, im->iop, 6);
}

void put_measures(W &w, DcmItem *fg, const dcm_image *im)
{
    DcmItem *it = w.item(fg, DCM_PixelMeasuresSequence);
    if (!it)
        return;
    w.put_ds(it, DCM_PixelSpacing, im->pixel_spacing, 2);
    if (std::isfinite(im->slice_thickness_mm))
        w.put_ds(it, DCM_SliceThickness, &im->slice_thickness_mm, 1);
    else
        w.fail(SW_EINVAL, "SliceThickness is required in an Enhanced MR image");
    w.put_ds3(it, DCM_SpacingBetweenSlices, im->spacing_between_slices_mm);
}

void put_rescale(W &w, DcmItem *fg, const dcm_image *im)
{
    DcmItem *it = w.item(fg, DCM_PixelValueTransformationSequence);
    if (!it)
        return;
    double m, b;
    frame_rescale(im, &m, &b);
    w.put_ds(it, DCM_RescaleIntercept, &b, 1);
    w.put_ds(it, DCM_RescaleSlope, &m, 1);
    w.put(it, DCM_RescaleType, "US");
}

void put_timing(W &w, DcmItem *fg, const dcm_image *im)
{
    DcmItem *it = w.item(fg, DCM_MRTimingAndRelatedParametersSequence);
    if (!it)
        return;
    if (!std::isfinite(im->repetition_time_ms))
        w.fail(SW_EINVAL, "RepetitionTime is required in an Enhanced MR image");
    w.put_ds2(it, DCM_RepetitionTime, im->repetition_time_ms);
    w.put_ds2(it, DCM_FlipAngle, im->flip_angle_deg);
    w.put(it, DCM_EchoTrainLength, "1");
    w.put(it, DCM_RFEchoTrainLength, "1");
    w.put(it, DCM_GradientEchoTrainLength, "0");
    /* Operating mode and SAR under IEC 60601-2-33: a simulated acquisition deposits no RF power,
     * so normal mode throughout and a head SAR of 0 W/kg. */
    static const char *const modes[] = {"STATIC FIELD", "RF", "GRADIENT"};
    for (const char *m : modes) {
        DcmItem *om = w.item(it, DCM_OperatingModeSequence);
        if (!om)
            return;
        w.put(om, DCM_OperatingModeType, m);
        w.put(om, DCM_OperatingMode, "IEC_NORMAL");
    }
    DcmItem *sar = w.item(it, DCM_SpecificAbsorptionRateSequence);
    if (!sar)
        return;
    w.put(sar, DCM_SpecificAbsorptionRateDefinition, "IEC_HEAD");
    w.put_fd(sar, DCM_SpecificAbsorptionRateValue, 0.0);
}

/* In-stack positions: the caller's, or the rank of each distinct position along the normal. */
std::vector<int> stack_positions(const dcm_image *f, int n)
{
    std::vector<int> pos(static_cast<size_t>(n));
    bool given = true;
    for (int i = 0; i < n; i++)
        if (f[i].in_stack_position <= 0)
            given = false;
    const double *r = f[0].iop, *c = f[0].iop + 3;
    double nrm[3] = {r[1] * c[2] - r[2] * c[1], r[2] * c[0] - r[0] * c[2],
                     r[0] * c[1] - r[1] * c[0]};
    std::vector<double> d(static_cast<size_t>(n));
    for (int i = 0; i < n; i++)
        d[i] = f[i].ipp[0] * nrm[0] + f[i].ipp[1] * nrm[1] + f[i].ipp[2] * nrm[2];
    for (int i = 0; i < n; i++) {
        if (given) {
            pos[i] = f[i].in_stack_position;
            continue;
        }
        std::vector<double> below;
        for (int j = 0; j < n; j++) {
            bool lower = d[j] < d[i] - 1e-6;
            bool seen = false;
            for (double x : below)
                if (std::fabs(x - d[j]) <= 1e-6)
                    seen = true;
            if (lower && !seen)
                below.push_back(d[j]);
        }
        pos[i] = static_cast<int>(below.size()) + 1;
    }
    return pos;
}

sw_status write_enhanced(W &w, const char *path, const dcm_image *f, int n)
{
    Uids u;
    size_t npix, total;
    char cdate[9], ctime[17];
    const dcm_image *f0 = &f[0];
    for (int i = 0; i < n; i++) {
        if (check_image(w, &f[i], i + 1) != SW_OK)
            return w.st;
        if (f[i].rows != f0->rows || f[i].columns != f0->columns)
            return w.fail(SW_EINVAL, "frame %d is %d x %d, frame 1 is %d x %d", i + 1, f[i].columns,
                          f[i].rows, f0->columns, f0->rows);
        if (f[i].echo_number < 1 || f[i].echo_number > 65535)
            return w.fail(SW_EINVAL, "frame %d: echo number %d out of range", i + 1,
                          f[i].echo_number);
        if (!std::isfinite(f[i].echo_time_ms))
            return w.fail(SW_EINVAL, "frame %d: EffectiveEchoTime is required", i + 1);
    }
    if (sw_mul_size(static_cast<size_t>(f0->rows), static_cast<size_t>(f0->columns), &npix) ||
        sw_mul_size(npix, static_cast<size_t>(n), &total) || total > ULONG_MAX / 2 ||
        total > 0xFFFFFFFEu / 2)
        return w.fail(SW_EINVAL, "%d frames of %d x %d do not fit one file", n, f0->columns,
                      f0->rows);
    if (pick_uids(w, f0, &u) != SW_OK)
        return w.st;
    std::vector<Uint16> stored(total);
    for (int i = 0; i < n; i++) {
        double m, b;
        frame_rescale(&f[i], &m, &b);
        if (to_stored(w, &f[i], m, b, stored.data() + npix * static_cast<size_t>(i), npix, i + 1) !=
            SW_OK)
            return w.st;
    }
    now(cdate, ctime);
    const char *content_date = f0->content_date[0] ? f0->content_date : cdate;
    const char *content_time = f0->content_time[0] ? f0->content_time : ctime;
    std::string acq_dt =
        std::string(f0->acquisition_date[0] ? f0->acquisition_date : content_date) +
        (f0->acquisition_date[0] ? f0->acquisition_time : content_time);
    char dim_uid[DCM_UID_MAX];
    dcm_new_uid(dim_uid, nullptr);
    std::vector<int> stackpos = stack_positions(f, n);
    /* A 2D spin-echo acquisition takes one repetition per phase-encoding step (the rows). */
    double duration_ms = std::isfinite(f0->repetition_time_ms)
                             ? f0->repetition_time_ms * static_cast<double>(f0->rows)
                             : 0.0;

    DcmFileFormat ff;
    DcmDataset *ds = ff.getDataset();
    put_common(w, ds, f0, u, ENHANCED_MR_IMAGE_STORAGE);
    /* Enhanced General Equipment: all four are type 1 here. */
    w.put(ds, DCM_Manufacturer, or_default(f0->manufacturer, "slicewarden"));
    w.put(ds, DCM_ManufacturerModelName, or_default(f0->model, "slicewarden"));
    w.put(ds, DCM_DeviceSerialNumber, or_default(f0->device_serial, "unknown"));
    w.put(ds, DCM_SoftwareVersions, or_default(f0->software_versions, "slicewarden " SW_VERSION));
    /* Multi-frame Functional Groups */
    if (f0->instance_number > 0)
        w.put_int(ds, DCM_InstanceNumber, f0->instance_number);
    else
        w.put(ds, DCM_InstanceNumber, "1");
    w.put(ds, DCM_ContentDate, content_date);
    w.put(ds, DCM_ContentTime, content_time);
    w.put_int(ds, DCM_NumberOfFrames, n);
    /* Multi-frame Dimension: stack, position in the stack, echo. */
    DcmItem *it = w.item(ds, DCM_DimensionOrganizationSequence);
    if (it)
        w.put(it, DCM_DimensionOrganizationUID, dim_uid);
    struct {
        DcmTagKey index, group;
        const char *label;
    } dims[] = {
        {DCM_StackID, DCM_FrameContentSequence, "Stack"},
        {DCM_InStackPositionNumber, DCM_FrameContentSequence, "Position in stack"},
        {DCM_EffectiveEchoTime, DCM_MREchoSequence, "Echo"},
    };
    for (auto &d : dims) {
        it = w.item(ds, DCM_DimensionIndexSequence);
        if (!it)
            break;
        w.put(it, DCM_DimensionOrganizationUID, dim_uid);
        w.put_at(it, DCM_DimensionIndexPointer, d.index);
        w.put_at(it, DCM_FunctionalGroupPointer, d.group);
        w.put(it, DCM_DimensionDescriptionLabel, d.label);
    }
    /* Acquisition Context */
    w.put_empty_seq(ds, DCM_AcquisitionContextSequence);
    /* Enhanced MR Image, MR Image and Spectroscopy Instance, MR Image Description */
    w.put(ds, DCM_ImageType, or_default(f0->image_type, "ORIGINAL\\PRIMARY\\VOLUME\\NONE"));
    if (f0->acquisition_number > 0)
        w.put_int(ds, DCM_AcquisitionNumber, f0->acquisition_number);
    w.put(ds, DCM_AcquisitionDateTime, acq_dt.c_str());
    w.put_fd(ds, DCM_AcquisitionDuration, duration_ms / 1000.0);
    w.put(ds, DCM_ContentQualification, "PRODUCT");
    w.put(ds, DCM_ResonantNucleus, "1H");
    w.put(ds, DCM_KSpaceFiltering, "NONE");
    w.put(ds, DCM_ApplicableSafetyStandardAgency, "IEC");
    if (!std::isfinite(f0->magnetic_field_t))
        w.fail(SW_EINVAL, "MagneticFieldStrength is required in an Enhanced MR image");
    w.put(ds, DCM_PixelPresentation, "MONOCHROME");
    w.put(ds, DCM_VolumetricProperties, "VOLUME");
    w.put(ds, DCM_VolumeBasedCalculationTechnique, "NONE");
    w.put(ds, DCM_ComplexImageComponent, "MAGNITUDE");
    w.put(ds, DCM_AcquisitionContrast, "UNKNOWN");
    w.put(ds, DCM_BurnedInAnnotation, "NO");
    w.put(ds, DCM_LossyImageCompression, "00");
    w.put(ds, DCM_PresentationLUTShape, "IDENTITY");
    /* MR Pulse Sequence: a plain 2D spin echo, Cartesian, fully sampled. */
    w.put(ds, DCM_PulseSequenceName, or_default(f0->scanning_sequence, "SE"));
    w.put(ds, DCM_MRAcquisitionType, or_default(f0->mr_acquisition_type, "2D"));
    w.put(ds, DCM_EchoPulseSequence, "SPIN");
    w.put(ds, DCM_MultipleSpinEcho, "NO");
    w.put(ds, DCM_MultiPlanarExcitation, "NO");
    w.put(ds, DCM_PhaseContrast, "NO");
    w.put(ds, DCM_TimeOfFlightContrast, "NO");
    w.put(ds, DCM_SteadyStatePulseSequence, "NONE");
    w.put(ds, DCM_EchoPlanarPulseSequence, "NO");
    w.put(ds, DCM_SaturationRecovery, "NO");
    w.put(ds, DCM_SpectrallySelectedSuppression, "NONE");
    w.put(ds, DCM_OversamplingPhase, "NONE");
    w.put(ds, DCM_GeometryOfKSpaceTraversal, "RECTILINEAR");
    w.put(ds, DCM_RectilinearPhaseEncodeReordering, "LINEAR");
    w.put(ds, DCM_SegmentedKSpaceTraversal, "SINGLE");
    w.put(ds, DCM_NumberOfKSpaceTrajectories, "1");
    put_pixel_module(w, ds, f0->rows, f0->columns);

    /* Shared Functional Groups */
    DcmItem *sh = w.item(ds, DCM_SharedFunctionalGroupsSequence);
    if (!sh)
        return w.st;
    bool shared_iop = same_orientation(f, n), shared_pm = same_measures(f, n);
    bool shared_rs = same_rescale(f, n), shared_tim = same_timing(f, n);
    if (shared_iop)
        put_orientation(w, sh, f0);
    if (shared_pm)
        put_measures(w, sh, f0);
    if (shared_rs)
        put_rescale(w, sh, f0);
    if (shared_tim)
        put_timing(w, sh, f0);
    it = w.item(sh, DCM_MRImageFrameTypeSequence);
    if (it) {
        w.put(it, DCM_FrameType, or_default(f0->image_type, "ORIGINAL\\PRIMARY\\VOLUME\\NONE"));
        w.put(it, DCM_PixelPresentation, "MONOCHROME");
        w.put(it, DCM_VolumetricProperties, "VOLUME");
        w.put(it, DCM_VolumeBasedCalculationTechnique, "NONE");
        w.put(it, DCM_ComplexImageComponent, "MAGNITUDE");
        w.put(it, DCM_AcquisitionContrast, "UNKNOWN");
    }
    it = w.item(sh, DCM_FrameAnatomySequence);
    if (it) {
        /* SNOMED CT 69536005 "Head" (code from memory): the large phantom is scanned in the
         * head coil as a head. */
        w.code(it, DCM_AnatomicRegionSequence, "69536005", "SCT", "Head");
        w.put(it, DCM_FrameLaterality, "U");
    }
    it = w.item(sh, DCM_MRFOVGeometrySequence);
    if (it) {
        w.put(it, DCM_InPlanePhaseEncodingDirection, "ROW");
        w.put_us(it, DCM_MRAcquisitionFrequencyEncodingSteps, static_cast<Uint16>(f0->columns));
        w.put_us(it, DCM_MRAcquisitionPhaseEncodingStepsInPlane, static_cast<Uint16>(f0->rows));
        w.put(it, DCM_PercentSampling, "100");
        w.put(it, DCM_PercentPhaseFieldOfView, "100");
    }
    it = w.item(sh, DCM_MRModifierSequence);
    if (it) {
        w.put(it, DCM_InversionRecovery, "NO");
        w.put(it, DCM_FlowCompensation, "NONE");
        w.put(it, DCM_T2Preparation, "NO");
        w.put(it, DCM_SpectrallySelectedExcitation, "NONE");
        w.put(it, DCM_SpatialPresaturation, "NONE");
        w.put(it, DCM_PartialFourier, "NO");
        w.put(it, DCM_ParallelAcquisition, "NO");
    }
    it = w.item(sh, DCM_MRImagingModifierSequence);
    if (it) {
        w.put(it, DCM_MagnetizationTransfer, "NONE");
        w.put(it, DCM_BloodSignalNulling, "NO");
        w.put(it, DCM_Tagging, "NONE");
        double mhz = f0->imaging_frequency_mhz;
        if (!std::isfinite(mhz))
            w.fail(SW_EINVAL, "ImagingFrequency is required in an Enhanced MR image");
        w.put_ds2(it, DCM_TransmitterFrequency, mhz);
        /* Type 1 here, and a number of the acquisition: required, never made up. */
        double bw = f0->pixel_bandwidth_hz;
        if (!(bw > 0) || !std::isfinite(bw))
            w.fail(SW_EINVAL, "PixelBandwidth is required in an Enhanced MR image");
        else
            w.put_ds(it, DCM_PixelBandwidth, &bw, 1);
    }
    it = w.item(sh, DCM_MRReceiveCoilSequence);
    if (it) {
        w.put(it, DCM_ReceiveCoilName, or_default(f0->receive_coil, "HEAD"));
        w.put(it, DCM_ReceiveCoilManufacturerName, "");
        w.put(it, DCM_ReceiveCoilType, "VOLUME");
        w.put(it, DCM_QuadratureReceiveCoil, "YES");
    }
    it = w.item(sh, DCM_MRTransmitCoilSequence);
    if (it) {
        w.put(it, DCM_TransmitCoilName, "BODY");
        w.put(it, DCM_TransmitCoilManufacturerName, "");
        w.put(it, DCM_TransmitCoilType, "BODY");
    }
    it = w.item(sh, DCM_MRAveragesSequence);
    if (it)
        w.put(it, DCM_NumberOfAverages, "1");
    it = w.item(sh, DCM_MRDiffusionSequence);
    if (it) {
        w.put_fd(it, DCM_DiffusionBValue, 0.0);
        w.put(it, DCM_DiffusionDirectionality, "NONE");
    }
    w.put_empty_seq(sh, DCM_MRSpatialSaturationSequence);

    /* Per-frame Functional Groups */
    for (int i = 0; i < n && w.ok(); i++) {
        const dcm_image *im = &f[i];
        DcmItem *pf = w.item(ds, DCM_PerFrameFunctionalGroupsSequence);
        if (!pf)
            break;
        it = w.item(pf, DCM_FrameContentSequence);
        if (it) {
            w.put_int(it, DCM_FrameAcquisitionNumber, i + 1);
            w.put(it, DCM_FrameReferenceDateTime, acq_dt.c_str());
            w.put(it, DCM_FrameAcquisitionDateTime, acq_dt.c_str());
            w.put_fd(it, DCM_FrameAcquisitionDuration, duration_ms);
            w.put(it, DCM_StackID, or_default(im->stack_id, "1"));
            Uint32 stackpos_u = static_cast<Uint32>(stackpos[static_cast<size_t>(i)]);
            if (w.ok() && it->putAndInsertUint32(DCM_InStackPositionNumber, stackpos_u).bad())
                w.fail(SW_ENOMEM, "cannot add InStackPositionNumber");
            Uint32 idx[3] = {1, stackpos_u, static_cast<Uint32>(im->echo_number)};
            w.put_ul(it, DCM_DimensionIndexValues, idx, 3);
        }
        it = w.item(pf, DCM_PlanePositionSequence);
        if (it)
            w.put_ds(it, DCM_ImagePositionPatient, im->ipp, 3);
        it = w.item(pf, DCM_MREchoSequence);
        if (it)
            w.put_fd(it, DCM_EffectiveEchoTime, im->echo_time_ms);
        if (!shared_iop)
            put_orientation(w, pf, im);
        if (!shared_pm)
            put_measures(w, pf, im);
        if (!shared_rs)
            put_rescale(w, pf, im);
        if (!shared_tim)
            put_timing(w, pf, im);
    }
    if (w.ok() &&
        ds->putAndInsertUint16Array(DCM_PixelData, stored.data(), static_cast<unsigned long>(total))
            .bad())
        return w.fail(SW_ENOMEM, "cannot add the pixel data");
    if (!w.ok())
        return w.st;
    return save_atomic(w, ff, path);
}

} /* namespace */

extern "C" sw_status dcm_write_mr(const char *path, const dcm_image *img, sw_error *err)
{
    return dcm_write_mr_flags(path, img, 0, err);
}

extern "C" sw_status dcm_write_enhanced_mr(const char *path, const dcm_image *frames, int n,
                                           sw_error *err)
{
    return dcm_write_enhanced_mr_flags(path, frames, n, 0, err);
}

extern "C" sw_status dcm_write_mr_flags(const char *path, const dcm_image *img, unsigned flags,
                                        sw_error *err)
{
    W w = {path ? path : "(null)", err, SW_OK, flags};
    if (!path || !img)
        return w.fail(SW_EINVAL, "no path or image given");
    if (!dcm_is_initialised())
        return w.fail(SW_EINVAL, "dcm_init has not been called");
    try {
        return write_mr(w, path, img);
    } catch (const std::bad_alloc &) {
        return w.fail(SW_ENOMEM, "out of memory");
    } catch (...) {
        return w.fail(SW_EIO, "unexpected failure while writing");
    }
}

extern "C" sw_status dcm_write_enhanced_mr_flags(const char *path, const dcm_image *frames, int n,
                                                 unsigned flags, sw_error *err)
{
    W w = {path ? path : "(null)", err, SW_OK, flags};
    if (!path || !frames || n < 1)
        return w.fail(SW_EINVAL, "no path or frames given");
    if (n > DCM_MAX_FRAMES)
        return w.fail(SW_EINVAL, "%d frames exceed the limit of %d", n, DCM_MAX_FRAMES);
    if (!dcm_is_initialised())
        return w.fail(SW_EINVAL, "dcm_init has not been called");
    try {
        return write_enhanced(w, path, frames, n);
    } catch (const std::bad_alloc &) {
        return w.fail(SW_ENOMEM, "out of memory");
    } catch (...) {
        return w.fail(SW_EIO, "unexpected failure while writing");
    }
}
