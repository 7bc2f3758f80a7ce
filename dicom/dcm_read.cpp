/* dcm_read.cpp: DICOM file or buffer -> dcm_file (attributes per frame, pixels as float). */
#include "dcm_internal.h"

#include <cerrno>
#include <cfloat>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <fcntl.h>
#include <memory>
#include <new>
#include <sys/mman.h>
#include <sys/stat.h>
#include <unistd.h>
#include <vector>
#include <zlib.h>

#include <dcmtk/config/osconfig.h>
#include <dcmtk/dcmdata/dcdeftag.h>
#include <dcmtk/dcmdata/dcfilefo.h>
#include <dcmtk/dcmdata/dcmetinf.h>
#include <dcmtk/dcmdata/dcpixel.h>
#include <dcmtk/dcmdata/dcpixseq.h>
#include <dcmtk/dcmdata/dcsequen.h>
#include <dcmtk/dcmdata/dcvrat.h>
#include <dcmtk/dcmdata/dcxfer.h>

namespace
{

/* Everything the reader needs while it works on one file. */
struct Reader {
    const char *name;
    sw_error *err;
    int header_only;
};

/* The places an attribute of one frame is looked up: the frame's item of the Per-frame Functional
 * Groups Sequence, the Shared Functional Groups item, then the top-level dataset. */
struct Frame {
    DcmItem *top;
    DcmItem *per;
    DcmItem *shared;
};

DcmItem *seq_item(DcmItem *parent, const DcmTagKey &seq, unsigned long idx = 0)
{
    DcmItem *it = nullptr;
    if (!parent || parent->findAndGetSequenceItem(seq, it, static_cast<signed long>(idx)).bad())
        return nullptr;
    return it;
}

DcmElement *elem(DcmItem *item, const DcmTagKey &tag)
{
    DcmElement *e = nullptr;
    if (!item || item->findAndGetElement(tag, e).bad() || !e || e->getLength() == 0)
        return nullptr;
    return e;
}

/* Element `tag` inside functional group macro `seq` of this frame (per-frame, then shared), then
 * at the top level when top_ok. */
DcmElement *fg_elem(const Frame &f, const DcmTagKey &seq, const DcmTagKey &tag, bool top_ok)
{
    DcmElement *e = elem(seq_item(f.per, seq), tag);
    if (!e)
        e = elem(seq_item(f.shared, seq), tag);
    if (!e && top_ok)
        e = elem(f.top, tag);
    return e;
}

/* Numeric value `pos` of an element of any numeric VR (or DS / IS text); false when absent,
 * unparsable or not finite. */
bool elem_num(DcmElement *e, unsigned long pos, double *out)
{
    if (!e || pos >= e->getVM())
        return false;
    double v = NAN;
    OFCondition c = EC_IllegalCall;
    switch (e->ident()) {
    case EVR_DS:
    case EVR_FD: {
        Float64 x = 0;
        c = e->getFloat64(x, pos);
        v = x;
        break;
    }
    case EVR_FL: {
        Float32 x = 0;
        c = e->getFloat32(x, pos);
        v = x;
        break;
    }
    case EVR_IS:
    case EVR_SL: {
        Sint32 x = 0;
        c = e->getSint32(x, pos);
        v = x;
        break;
    }
    case EVR_SS: {
        Sint16 x = 0;
        c = e->getSint16(x, pos);
        v = x;
        break;
    }
    case EVR_US: {
        Uint16 x = 0;
        c = e->getUint16(x, pos);
        v = x;
        break;
    }
    case EVR_UL: {
        Uint32 x = 0;
        c = e->getUint32(x, pos);
        v = x;
        break;
    }
    default: return false;
    }
    if (c.bad() || !std::isfinite(v))
        return false;
    *out = v;
    return true;
}

bool get_num(DcmItem *item, const DcmTagKey &tag, unsigned long pos, double *out)
{
    return elem_num(elem(item, tag), pos, out);
}

/* An integer attribute; false when absent, not a number, not integral or out of int range. */
bool get_int(DcmItem *item, const DcmTagKey &tag, int *out)
{
    double v;
    if (!get_num(item, tag, 0, &v) || v != std::floor(v) || v < -2147483648.0 || v > 2147483647.0)
        return false;
    *out = static_cast<int>(v);
    return true;
}

/* All values of a text element, joined with '\', as clean UTF-8 (the dataset was converted to
 * UTF-8 where DCMTK could). Empty when absent. */
void elem_text(DcmElement *e, char *dst, size_t n)
{
    dst[0] = '\0';
    OFString s;
    /* Only text VRs: an unconverted UN or binary value is no text (DCMTK would give hex). */
    if (!e || !DcmVR(e->getVR()).isaString() || e->getOFStringArray(s).bad())
        return;
    /* PN: trailing empty components and groups carry nothing (PS3.5 6.2.1.1). */
    if (e->ident() == EVR_PN)
        while (!s.empty() &&
               (s[s.size() - 1] == '^' || s[s.size() - 1] == '=' || s[s.size() - 1] == ' '))
            s.erase(s.size() - 1);
    dcm_copy_text(dst, n, s.c_str());
}

void get_text(DcmItem *item, const DcmTagKey &tag, char *dst, size_t n)
{
    elem_text(elem(item, tag), dst, n);
}

/* A UID attribute: false when present but longer than 64 characters (malformed; truncating it
 * would merge distinct objects). */
bool get_uid(DcmItem *item, const DcmTagKey &tag, char *dst)
{
    dst[0] = '\0';
    DcmElement *e = elem(item, tag);
    OFString s;
    if (!e || e->ident() != EVR_UI || e->getOFString(s, 0).bad())
        return true;
    /* Trailing NUL or space padding is not part of the UID. */
    while (!s.empty() && (s[s.size() - 1] == '\0' || s[s.size() - 1] == ' '))
        s.erase(s.size() - 1);
    if (s.size() > DCM_UID_MAX - 1)
        return false;
    dcm_copy_text(dst, DCM_UID_MAX, s.c_str());
    return true;
}

/* DT "YYYYMMDDHHMMSS.FFFFFF&ZZXX" -> date (8) and time (up to the offset). */
void split_datetime(const char *dt, char *date, size_t dn, char *time, size_t tn)
{
    size_t len = strlen(dt);
    if (len < 8)
        return;
    char d[9];
    memcpy(d, dt, 8);
    d[8] = '\0';
    sw_strlcpy(date, d, dn);
    char t[32];
    size_t k = 0;
    for (size_t i = 8; i < len && k < sizeof t - 1 && dt[i] != '+' && dt[i] != '-'; i++)
        t[k++] = dt[i];
    t[k] = '\0';
    sw_strlcpy(time, t, tn);
}

bool is_jpeg2000(const char *uid)
{
    static const char *const j2k[] = {
        "1.2.840.10008.1.2.4.90",  "1.2.840.10008.1.2.4.91",  "1.2.840.10008.1.2.4.92",
        "1.2.840.10008.1.2.4.93",  "1.2.840.10008.1.2.4.201", "1.2.840.10008.1.2.4.202",
        "1.2.840.10008.1.2.4.203",
    };
    for (const char *u : j2k)
        if (strcmp(uid, u) == 0)
            return true;
    return false;
}

/* Attributes common to every frame, from the top level (and the meta header). */
sw_status read_common(const Reader &r, DcmDataset *ds, DcmMetaInfo *meta, const char *xfer_uid,
                      dcm_image *t)
{
    struct UidTag {
        const DcmTagKey tag;
        char *dst;
        const char *label;
    } uids[] = {
        {DCM_SOPClassUID, t->sop_class_uid, "SOPClassUID"},
        {DCM_SOPInstanceUID, t->sop_instance_uid, "SOPInstanceUID"},
        {DCM_StudyInstanceUID, t->study_instance_uid, "StudyInstanceUID"},
        {DCM_SeriesInstanceUID, t->series_instance_uid, "SeriesInstanceUID"},
        {DCM_FrameOfReferenceUID, t->frame_of_reference_uid, "FrameOfReferenceUID"},
    };
    for (const UidTag &u : uids)
        if (!get_uid(ds, u.tag, u.dst))
            return dcm_fail(r.err, SW_EFORMAT, r.name, "%s is longer than 64 characters", u.label);
    if (!t->sop_class_uid[0] && meta &&
        !get_uid(meta, DCM_MediaStorageSOPClassUID, t->sop_class_uid))
        return dcm_fail(r.err, SW_EFORMAT, r.name, "MediaStorageSOPClassUID is too long");
    if (!t->sop_instance_uid[0] && meta &&
        !get_uid(meta, DCM_MediaStorageSOPInstanceUID, t->sop_instance_uid))
        return dcm_fail(r.err, SW_EFORMAT, r.name, "MediaStorageSOPInstanceUID is too long");
    sw_strlcpy(t->transfer_syntax_uid, xfer_uid, sizeof t->transfer_syntax_uid);

    struct TextTag {
        const DcmTagKey tag;
        char *dst;
        size_t n;
    } texts[] = {
        {DCM_Modality, t->modality, sizeof t->modality},
        {DCM_StationName, t->station_name, sizeof t->station_name},
        {DCM_DeviceSerialNumber, t->device_serial, sizeof t->device_serial},
        {DCM_Manufacturer, t->manufacturer, sizeof t->manufacturer},
        {DCM_ManufacturerModelName, t->model, sizeof t->model},
        {DCM_InstitutionName, t->institution, sizeof t->institution},
        {DCM_SeriesDescription, t->series_description, sizeof t->series_description},
        {DCM_ProtocolName, t->protocol_name, sizeof t->protocol_name},
        {DCM_PatientName, t->patient_name, sizeof t->patient_name},
        {DCM_PatientID, t->patient_id, sizeof t->patient_id},
        {DCM_MRAcquisitionType, t->mr_acquisition_type, sizeof t->mr_acquisition_type},
        {DCM_StudyDate, t->study_date, sizeof t->study_date},
        {DCM_SeriesDate, t->series_date, sizeof t->series_date},
        {DCM_AcquisitionDate, t->acquisition_date, sizeof t->acquisition_date},
        {DCM_ContentDate, t->content_date, sizeof t->content_date},
        {DCM_StudyTime, t->study_time, sizeof t->study_time},
        {DCM_SeriesTime, t->series_time, sizeof t->series_time},
        {DCM_AcquisitionTime, t->acquisition_time, sizeof t->acquisition_time},
        {DCM_ContentTime, t->content_time, sizeof t->content_time},
        {DCM_PhotometricInterpretation, t->photometric, sizeof t->photometric},
        {DCM_ImageType, t->image_type, sizeof t->image_type},
        {DCM_ScanningSequence, t->scanning_sequence, sizeof t->scanning_sequence},
        {DCM_SequenceVariant, t->sequence_variant, sizeof t->sequence_variant},
        {DCM_SoftwareVersions, t->software_versions, sizeof t->software_versions},
        {DCM_ReceiveCoilName, t->receive_coil, sizeof t->receive_coil},
        {DCM_PatientPosition, t->patient_position, sizeof t->patient_position},
    };
    for (const TextTag &x : texts)
        get_text(ds, x.tag, x.dst, x.n);
    /* Enhanced objects carry AcquisitionDateTime instead of the date and time pair. */
    if (!t->acquisition_date[0]) {
        char dt[64];
        get_text(ds, DCM_AcquisitionDateTime, dt, sizeof dt);
        split_datetime(dt, t->acquisition_date, sizeof t->acquisition_date, t->acquisition_time,
                       sizeof t->acquisition_time);
    }

    get_int(ds, DCM_SeriesNumber, &t->series_number);
    get_int(ds, DCM_InstanceNumber, &t->instance_number);
    get_int(ds, DCM_AcquisitionNumber, &t->acquisition_number);
    double v;
    t->echo_number = 1;
    if (get_num(ds, DCM_EchoNumbers, 0, &v) && v == std::floor(v) && v >= 1 && v <= 65535)
        t->echo_number = static_cast<int>(v);
    get_num(ds, DCM_MagneticFieldStrength, 0, &t->magnetic_field_t);
    get_num(ds, DCM_ImagingFrequency, 0, &t->imaging_frequency_mhz);

    /* Pixel module as stated (checked against the pixel data only when pixels are read). */
    int x;
    if (get_int(ds, DCM_Rows, &x))
        t->rows = x;
    if (get_int(ds, DCM_Columns, &x))
        t->columns = x;
    if (get_int(ds, DCM_BitsAllocated, &x))
        t->bits_allocated = x;
    if (get_int(ds, DCM_BitsStored, &x))
        t->bits_stored = x;
    else
        t->bits_stored = t->bits_allocated;
    if (get_int(ds, DCM_HighBit, &x))
        t->high_bit = x;
    else
        t->high_bit = t->bits_stored - 1;
    if (get_int(ds, DCM_PixelRepresentation, &x))
        t->pixel_representation = x;
    return SW_OK;
}

/* Per-frame attributes: geometry, rescale, timing, echo, stack. */
void read_frame(const Frame &f, int echo_dim, dcm_image *im)
{
    double v[6];
    bool ok = true;
    DcmElement *e = fg_elem(f, DCM_PlanePositionSequence, DCM_ImagePositionPatient, true);
    for (unsigned long i = 0; i < 3; i++)
        if (!elem_num(e, i, &v[i]))
            ok = false;
    bool have_ipp = ok;
    if (ok)
        memcpy(im->ipp, v, sizeof im->ipp);
    ok = true;
    e = fg_elem(f, DCM_PlaneOrientationSequence, DCM_ImageOrientationPatient, true);
    for (unsigned long i = 0; i < 6; i++)
        if (!elem_num(e, i, &v[i]))
            ok = false;
    bool have_iop = ok;
    if (ok)
        memcpy(im->iop, v, sizeof im->iop);
    ok = true;
    e = fg_elem(f, DCM_PixelMeasuresSequence, DCM_PixelSpacing, true);
    for (unsigned long i = 0; i < 2; i++)
        if (!elem_num(e, i, &v[i]))
            ok = false;
    bool have_ps = ok;
    if (ok)
        memcpy(im->pixel_spacing, v, sizeof im->pixel_spacing);
    im->has_geometry = have_ipp && have_iop && have_ps;

    elem_num(fg_elem(f, DCM_PixelMeasuresSequence, DCM_SliceThickness, true), 0,
             &im->slice_thickness_mm);
    elem_num(fg_elem(f, DCM_PixelMeasuresSequence, DCM_SpacingBetweenSlices, true), 0,
             &im->spacing_between_slices_mm);

    double slope = 1.0, icept = 0.0;
    if (elem_num(fg_elem(f, DCM_PixelValueTransformationSequence, DCM_RescaleSlope, true), 0,
                 &v[0]))
        slope = v[0];
    if (elem_num(fg_elem(f, DCM_PixelValueTransformationSequence, DCM_RescaleIntercept, true), 0,
                 &v[0]))
        icept = v[0];
    im->rescale_slope = slope;
    im->rescale_intercept = icept;

    /* Echo time: Enhanced MREchoSequence EffectiveEchoTime, else classic EchoTime. */
    if (!elem_num(fg_elem(f, DCM_MREchoSequence, DCM_EffectiveEchoTime, true), 0,
                  &im->echo_time_ms))
        elem_num(elem(f.top, DCM_EchoTime), 0, &im->echo_time_ms);
    elem_num(fg_elem(f, DCM_MRTimingAndRelatedParametersSequence, DCM_RepetitionTime, true), 0,
             &im->repetition_time_ms);
    elem_num(fg_elem(f, DCM_MRTimingAndRelatedParametersSequence, DCM_FlipAngle, true), 0,
             &im->flip_angle_deg);
    if (!std::isfinite(im->imaging_frequency_mhz))
        elem_num(fg_elem(f, DCM_MRImagingModifierSequence, DCM_TransmitterFrequency, false), 0,
                 &im->imaging_frequency_mhz);
    elem_num(fg_elem(f, DCM_MRImagingModifierSequence, DCM_PixelBandwidth, true), 0,
             &im->pixel_bandwidth_hz);
    if (!im->receive_coil[0])
        elem_text(fg_elem(f, DCM_MRReceiveCoilSequence, DCM_ReceiveCoilName, false),
                  im->receive_coil, sizeof im->receive_coil);

    /* Frame content (per frame only). */
    DcmItem *fc = seq_item(f.per, DCM_FrameContentSequence);
    if (fc) {
        get_text(fc, DCM_StackID, im->stack_id, sizeof im->stack_id);
        int pos;
        if (get_int(fc, DCM_InStackPositionNumber, &pos) && pos > 0)
            im->in_stack_position = pos;
        if (echo_dim >= 0 &&
            elem_num(elem(fc, DCM_DimensionIndexValues), static_cast<unsigned long>(echo_dim),
                     &v[0]) &&
            v[0] >= 1 && v[0] <= 65535 && v[0] == std::floor(v[0]))
            im->echo_number = static_cast<int>(v[0]);
        char dt[64];
        get_text(fc, DCM_FrameAcquisitionDateTime, dt, sizeof dt);
        split_datetime(dt, im->acquisition_date, sizeof im->acquisition_date, im->acquisition_time,
                       sizeof im->acquisition_time);
    }
}

/* Index of the dimension whose pointer is EffectiveEchoTime in DimensionIndexSequence, or -1. */
int echo_dimension(DcmDataset *ds)
{
    DcmSequenceOfItems *seq = nullptr;
    if (ds->findAndGetSequence(DCM_DimensionIndexSequence, seq).bad() || !seq)
        return -1;
    for (unsigned long i = 0; i < seq->card(); i++) {
        DcmElement *e = elem(seq->getItem(i), DCM_DimensionIndexPointer);
        DcmTagKey key;
        if (e && e->ident() == EVR_AT &&
            static_cast<DcmAttributeTag *>(e)->getTagVal(key, 0).good() &&
            key == DCM_EffectiveEchoTime)
            return static_cast<int>(i);
    }
    return -1;
}

/* Multi-frame files without an echo dimension: number echoes by rank of distinct effective echo
 * times (1 = shortest), which is how multi-echo series are ordered. */
void echo_by_rank(dcm_file *f)
{
    std::vector<double> tes;
    for (int i = 0; i < f->nframes; i++) {
        double te = f->frames[i].echo_time_ms;
        if (!std::isfinite(te))
            return;
        bool seen = false;
        for (double x : tes)
            if (x == te)
                seen = true;
        if (!seen)
            tes.push_back(te);
    }
    if (tes.size() < 2)
        return;
    for (int i = 0; i < f->nframes; i++) {
        int rank = 1;
        for (double x : tes)
            if (x < f->frames[i].echo_time_ms)
                rank++;
        f->frames[i].echo_number = rank;
    }
}

void init_image(dcm_image *im)
{
    memset(im, 0, sizeof *im);
    im->echo_number = 1;
    im->echo_time_ms = NAN;
    im->repetition_time_ms = NAN;
    im->slice_thickness_mm = NAN;
    im->spacing_between_slices_mm = NAN;
    im->magnetic_field_t = NAN;
    im->imaging_frequency_mhz = NAN;
    im->flip_angle_deg = NAN;
    im->pixel_bandwidth_hz = NAN;
    for (double &d : im->ipp)
        d = NAN;
    for (double &d : im->iop)
        d = NAN;
    im->pixel_spacing[0] = im->pixel_spacing[1] = NAN;
    im->rescale_slope = 1.0;
    im->rescale_intercept = 0.0;
    im->frame_count = 1;
}

/* Stored value k of the frame data: bytes (OB) in the file's byte order, or 16-bit words (OW) in
 * host order as DCMTK hands them out (big-endian input swapped per word). */
struct Raw {
    const Uint8 *b;
    const Uint16 *w;
    int nbytes; /* bytes per stored value: 1, 2 or 4 */
    bool big;   /* the words or bytes came from a big-endian encoding */

    uint32_t at(size_t k) const
    {
        if (b) {
            const Uint8 *p = b + k * static_cast<size_t>(nbytes);
            uint32_t v = 0;
            for (int i = 0; i < nbytes; i++) {
                int shift = big ? 8 * (nbytes - 1 - i) : 8 * i;
                v |= static_cast<uint32_t>(p[i]) << shift;
            }
            return v;
        }
        switch (nbytes) {
        case 1: { /* byte k of the stream: in little endian the odd bytes are high halves */
            Uint16 word = w[k >> 1];
            bool high = big ? !(k & 1) : (k & 1);
            return high ? (word >> 8) & 0xFFu : word & 0xFFu;
        }
        case 2: return w[k];
        default:
            return big ? (static_cast<uint32_t>(w[2 * k]) << 16) | w[2 * k + 1]
                       : w[2 * k] | (static_cast<uint32_t>(w[2 * k + 1]) << 16);
        }
    }
};

/* The image pixel module as the dataset states it, checked: what the reader supports and a
 * decoded size within DCM_MAX_PIXEL_BYTES. */
struct PixelModule {
    int rows, cols, ba, bs, hb, rep;
    char photometric[17];
};

sw_status pixel_module(const Reader &r, DcmDataset *ds, int nframes, PixelModule *pm)
{
    int samples = 1, x;
    if (get_int(ds, DCM_SamplesPerPixel, &x))
        samples = x;
    get_text(ds, DCM_PhotometricInterpretation, pm->photometric, sizeof pm->photometric);
    if (samples != 1)
        return dcm_fail(r.err, SW_EUNSUPPORTED, r.name,
                        "SamplesPerPixel %d (%s) is not supported: only monochrome images", samples,
                        pm->photometric[0] ? pm->photometric : "colour");
    if (!pm->photometric[0])
        sw_strlcpy(pm->photometric, "MONOCHROME2", sizeof pm->photometric);
    if (strcmp(pm->photometric, "MONOCHROME1") != 0 && strcmp(pm->photometric, "MONOCHROME2") != 0)
        return dcm_fail(r.err, SW_EUNSUPPORTED, r.name,
                        "PhotometricInterpretation %s is not supported: only MONOCHROME1/2",
                        pm->photometric);
    pm->rows = pm->cols = pm->ba = pm->rep = 0;
    get_int(ds, DCM_Rows, &pm->rows);
    get_int(ds, DCM_Columns, &pm->cols);
    get_int(ds, DCM_BitsAllocated, &pm->ba);
    if (!get_int(ds, DCM_BitsStored, &pm->bs))
        pm->bs = pm->ba;
    if (!get_int(ds, DCM_HighBit, &pm->hb))
        pm->hb = pm->bs - 1;
    get_int(ds, DCM_PixelRepresentation, &pm->rep);
    if (pm->rows < 1 || pm->cols < 1 || pm->rows > 65535 || pm->cols > 65535)
        return dcm_fail(r.err, SW_EFORMAT, r.name,
                        "bad or missing image size (Columns %d, Rows %d)", pm->cols, pm->rows);
    if (pm->ba != 8 && pm->ba != 16 && pm->ba != 32)
        return dcm_fail(r.err, SW_EUNSUPPORTED, r.name,
                        "BitsAllocated %d is not supported (8, 16 or 32)", pm->ba);
    if (pm->bs < 1 || pm->bs > pm->ba || pm->hb < pm->bs - 1 || pm->hb >= pm->ba)
        return dcm_fail(r.err, SW_EFORMAT, r.name, "inconsistent BitsStored %d / HighBit %d",
                        pm->bs, pm->hb);
    if (pm->rep != 0 && pm->rep != 1)
        return dcm_fail(r.err, SW_EFORMAT, r.name, "bad PixelRepresentation %d", pm->rep);
    /* at most 2^16 * 2^16 * 4 * 1e5 < 2^64 */
    uint64_t bytes = static_cast<uint64_t>(pm->rows) * static_cast<uint64_t>(pm->cols) *
                     static_cast<uint64_t>(pm->ba / 8) * static_cast<uint64_t>(nframes);
    if (bytes > DCM_MAX_PIXEL_BYTES)
        return dcm_fail(r.err, SW_EUNSUPPORTED, r.name,
                        "%d frame(s) of %d x %d x %d bits are %.0f MiB of pixels, over the %d MiB "
                        "this reader takes",
                        nframes, pm->cols, pm->rows, pm->ba, static_cast<double>(bytes) / 1048576.0,
                        DCM_MAX_PIXEL_BYTES / 1048576);
    return SW_OK;
}

/* Decodes the pixel data into every frame's float buffer. */
sw_status read_pixels(const Reader &r, DcmDataset *ds, E_TransferSyntax xfer, dcm_file *out)
{
    DcmElement *pe = nullptr;
    if (ds->findAndGetElement(DCM_PixelData, pe).bad() || !pe) {
        if (elem(ds, DCM_FloatPixelData) || elem(ds, DCM_DoubleFloatPixelData))
            return dcm_fail(r.err, SW_EUNSUPPORTED, r.name, "float pixel data is not supported");
        return dcm_fail(r.err, SW_EUNSUPPORTED, r.name, "no pixel data (not an image)");
    }
    if (pe->ident() != EVR_PixelData)
        return dcm_fail(r.err, SW_EFORMAT, r.name, "PixelData has an unexpected encoding");

    DcmXfer xf(xfer);
    bool big = false;
    PixelModule pm;
    /* The pixel module is checked before any decoder runs: a decoder sizes its output from it
     * (rows x columns x samples x frames), so a damaged one would make it allocate gigabytes
     * for a few kilobytes of input. */
    sw_status st = pixel_module(r, ds, out->nframes, &pm);
    if (st != SW_OK)
        return st;
    if (xf.isEncapsulated()) {
        OFCondition c = ds->chooseRepresentation(EXS_LittleEndianExplicit, nullptr);
        if (c.bad() || !ds->canWriteXfer(EXS_LittleEndianExplicit))
            return dcm_fail(r.err, SW_EFORMAT, r.name, "cannot decode %s pixel data: %s",
                            xf.getXferName(), c.bad() ? c.text() : "no decoder for the data");
        /* The decoder may have changed the pixel module (bits allocated, photometric). */
        if (ds->findAndGetElement(DCM_PixelData, pe).bad() || !pe)
            return dcm_fail(r.err, SW_EFORMAT, r.name, "pixel data lost in decoding");
        st = pixel_module(r, ds, out->nframes, &pm);
        if (st != SW_OK)
            return st;
    } else {
        big = xf.isBigEndian();
    }
    const int rows = pm.rows, cols = pm.cols, ba = pm.ba, bs = pm.bs, hb = pm.hb, rep = pm.rep;
    const char *photometric = pm.photometric;

    /* Sizes from the header: check before trusting them. */
    size_t npix, frame_bytes, need;
    int nbytes = ba / 8;
    if (sw_mul_size(static_cast<size_t>(rows), static_cast<size_t>(cols), &npix) ||
        sw_mul_size(npix, static_cast<size_t>(nbytes), &frame_bytes) ||
        sw_mul_size(frame_bytes, static_cast<size_t>(out->nframes), &need))
        return dcm_fail(r.err, SW_EFORMAT, r.name, "image size overflows");
    size_t have = pe->getLength();

    Raw raw = {nullptr, nullptr, nbytes, big};
    if (pe->getVR() == EVR_OB) {
        Uint8 *p = nullptr;
        if (pe->getUint8Array(p).bad() || (!p && have))
            return dcm_fail(r.err, SW_EFORMAT, r.name, "cannot access pixel data");
        raw.b = p;
    } else {
        Uint16 *p = nullptr;
        if (pe->getUint16Array(p).bad() || (!p && have))
            return dcm_fail(r.err, SW_EFORMAT, r.name, "cannot access pixel data");
        raw.w = p;
        have &= ~static_cast<size_t>(1);
    }
    if (have < need)
        return dcm_fail(r.err, SW_EFORMAT, r.name,
                        "pixel data is truncated: %zu bytes for %d frame(s) of %d x %d x %d bits "
                        "(%zu needed)",
                        have, out->nframes, cols, rows, ba, need);
    size_t fbytes;
    if (sw_mul_size(npix, sizeof(float), &fbytes))
        return dcm_fail(r.err, SW_EFORMAT, r.name, "image size overflows");

    const int shift = hb + 1 - bs;
    const uint32_t mask = bs == 32 ? 0xFFFFFFFFu : ((1u << bs) - 1u);
    const uint32_t sign = 1u << (bs - 1);
    for (int fi = 0; fi < out->nframes; fi++) {
        dcm_image &im = out->frames[fi];
        im.rows = rows;
        im.columns = cols;
        im.bits_allocated = ba;
        im.bits_stored = bs;
        im.high_bit = hb;
        im.pixel_representation = rep;
        sw_strlcpy(im.photometric, photometric, sizeof im.photometric);
        if (!std::isfinite(im.rescale_slope) || im.rescale_slope == 0.0 ||
            !std::isfinite(im.rescale_intercept))
            return dcm_fail(r.err, SW_EFORMAT, r.name, "frame %d: bad RescaleSlope %g", fi + 1,
                            im.rescale_slope);
        /* Every value must be a finite float: |stored| < 2^bs, so |slope| 2^bs + |intercept|
         * bounds it (a value beyond FLT_MAX would turn into an infinite pixel). */
        if (std::fabs(im.rescale_slope) * std::ldexp(1.0, bs) + std::fabs(im.rescale_intercept) >
            static_cast<double>(FLT_MAX))
            return dcm_fail(r.err, SW_EFORMAT, r.name,
                            "frame %d: RescaleSlope %g and RescaleIntercept %g give values beyond "
                            "the float range",
                            fi + 1, im.rescale_slope, im.rescale_intercept);
        im.pixels = static_cast<float *>(malloc(fbytes));
        if (!im.pixels)
            return dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory for %d x %d pixels", cols,
                            rows);
        const double m = im.rescale_slope, b = im.rescale_intercept;
        const size_t base = npix * static_cast<size_t>(fi);
        /* stored bits -> value: mask, then two's complement in bs bits when signed */
        auto value = [shift, mask, sign, rep, bs](uint32_t word) -> double {
            uint32_t s = (word >> shift) & mask;
            if (rep == 1 && (s & sign))
                return static_cast<double>(static_cast<int64_t>(s) -
                                           (static_cast<int64_t>(1) << bs));
            return static_cast<double>(s);
        };
        /* The common layouts get a loop of their own, without the general accessor. */
        /* Up to 16 stored bits and many more pixels than stored values (12-bit MR: 4096 values,
         * 65536 pixels): a table of each stored value's float, made with the same arithmetic,
         * then one lookup a pixel. Values unchanged to the bit; a fifth fewer instructions to
         * read a 12-bit series. */
        float *lut = nullptr;
        const size_t nvalues = static_cast<size_t>(1) << (bs <= 16 ? bs : 0);
        if (raw.w && nbytes == 2 && bs <= 16 && nvalues <= npix / 4 &&
            (lut = static_cast<float *>(malloc(nvalues * sizeof *lut))) != nullptr) {
            for (size_t s = 0; s < nvalues; s++)
                lut[s] = static_cast<float>(value(static_cast<uint32_t>(s) << shift) * m + b);
            const Uint16 *src = raw.w + base;
            float *dst = im.pixels;
            for (size_t k = 0; k < npix; k++)
                dst[k] = lut[(static_cast<uint32_t>(src[k]) >> shift) & mask];
            free(lut);
        } else if (raw.w && nbytes == 2) {
            const Uint16 *src = raw.w + base;
            for (size_t k = 0; k < npix; k++)
                im.pixels[k] = static_cast<float>(value(src[k]) * m + b);
        } else if (raw.b && nbytes == 1) {
            const Uint8 *src = raw.b + base;
            for (size_t k = 0; k < npix; k++)
                im.pixels[k] = static_cast<float>(value(src[k]) * m + b);
        } else {
            for (size_t k = 0; k < npix; k++)
                im.pixels[k] = static_cast<float>(value(raw.at(base + k)) * m + b);
        }
    }
    return SW_OK;
}

/* Can the pixel data hold nframes frames? Checked before a record per frame is allocated, so a
 * damaged NumberOfFrames costs nothing. Native data: its length against rows x columns x bits;
 * encapsulated data: at least one fragment per frame (PS3.5 A.4). Absent pixel data is left to
 * the pixel reader. */
sw_status check_frame_count(const Reader &r, DcmDataset *ds, E_TransferSyntax xfer, int nframes)
{
    DcmElement *pe = nullptr;
    if (nframes <= 1 || ds->findAndGetElement(DCM_PixelData, pe).bad() || !pe ||
        pe->ident() != EVR_PixelData)
        return SW_OK;
    if (DcmXfer(xfer).isEncapsulated()) {
        DcmPixelSequence *seq = nullptr;
        DcmPixelData *pd = static_cast<DcmPixelData *>(pe);
        if (pd->getEncapsulatedRepresentation(xfer, nullptr, seq).bad() || !seq)
            return SW_OK; /* the decoder will say what is wrong */
        unsigned long frags = seq->card() > 0 ? seq->card() - 1 : 0; /* item 0: offset table */
        if (frags < static_cast<unsigned long>(nframes))
            return dcm_fail(r.err, SW_EFORMAT, r.name,
                            "NumberOfFrames %d, but only %lu compressed fragments", nframes, frags);
        return SW_OK;
    }
    int rows = 0, cols = 0, ba = 0;
    get_int(ds, DCM_Rows, &rows);
    get_int(ds, DCM_Columns, &cols);
    get_int(ds, DCM_BitsAllocated, &ba);
    if (rows < 1 || cols < 1 || ba < 1 || ba > 64)
        return SW_OK;
    /* bits in total, at most 2^16 * 2^16 * 64 * 1e5 < 2^63 */
    uint64_t bits = static_cast<uint64_t>(rows) * static_cast<uint64_t>(cols) *
                    static_cast<uint64_t>(ba) * static_cast<uint64_t>(nframes);
    if (bits / 8 > pe->getLength())
        return dcm_fail(r.err, SW_EFORMAT, r.name,
                        "NumberOfFrames %d does not fit the pixel data (%lu bytes)", nframes,
                        static_cast<unsigned long>(pe->getLength()));
    return SW_OK;
}

/* Strings into UTF-8 when the object declares another character set. Where DCMTK cannot convert
 * (unknown or broken set) the strings stay as stored and dcm_copy_text masks what is not UTF-8. */
void to_utf8(DcmDataset *ds)
{
    OFString cs;
    if (ds->findAndGetOFStringArray(DCM_SpecificCharacterSet, cs).bad())
        return;
    if (cs.empty() || cs == "ISO_IR 6" || cs == "ISO_IR 192")
        return;
    (void)ds->convertToUTF8();
}

/* The dataset is loaded: check the encoding, build the frames, decode the pixels. */
sw_status build(const Reader &r, DcmMetaInfo *meta, DcmDataset *ds, dcm_file **out)
{
    sw_status st = SW_OK;
    dcm_file *f = nullptr;
    E_TransferSyntax xfer = ds->getOriginalXfer();
    char xfer_uid[DCM_UID_MAX] = "";
    DcmSequenceOfItems *per_seq = nullptr;
    DcmItem *shared = nullptr;
    bool multiframe;
    int nframes = 1, echo_dim;

    if (meta && !get_uid(meta, DCM_TransferSyntaxUID, xfer_uid)) {
        st = dcm_fail(r.err, SW_EFORMAT, r.name, "TransferSyntaxUID is too long");
        goto out;
    }
    if (!xfer_uid[0] || xfer == EXS_Unknown) {
        /* No meta header, or a meta header without the syntax: what DCMTK detected. */
        if (xfer != EXS_Unknown)
            sw_strlcpy(xfer_uid, DcmXfer(xfer).getXferID(), sizeof xfer_uid);
    }
    if (is_jpeg2000(xfer_uid)) {
        if (!r.header_only) {
            st = dcm_fail(r.err, SW_EUNSUPPORTED, r.name, "JPEG 2000 is not supported");
            goto out;
        }
    } else if (xfer == EXS_Unknown || (xfer_uid[0] && DcmXfer(xfer_uid).getXfer() == EXS_Unknown)) {
        st = dcm_fail(r.err, SW_EUNSUPPORTED, r.name, "transfer syntax %s is not supported",
                      xfer_uid[0] ? xfer_uid : "(unknown)");
        goto out;
    }
    {
        double v;
        multiframe = elem(ds, DCM_NumberOfFrames) != nullptr;
        if (multiframe) {
            if (!get_num(ds, DCM_NumberOfFrames, 0, &v) || v != std::floor(v) || v < 1 ||
                v > DCM_MAX_FRAMES) {
                OFString s;
                ds->findAndGetOFString(DCM_NumberOfFrames, s);
                st = dcm_fail(r.err, SW_EFORMAT, r.name,
                              "NumberOfFrames '%.32s' is not a count from 1 to %d", s.c_str(),
                              DCM_MAX_FRAMES);
                goto out;
            }
            nframes = static_cast<int>(v);
        }
    }
    st = check_frame_count(r, ds, xfer, nframes);
    if (st != SW_OK)
        goto out;
    if (ds->findAndGetSequence(DCM_PerFrameFunctionalGroupsSequence, per_seq).bad())
        per_seq = nullptr;
    if (per_seq && per_seq->card() < static_cast<unsigned long>(nframes)) {
        st = dcm_fail(r.err, SW_EFORMAT, r.name,
                      "PerFrameFunctionalGroupsSequence has %lu items for %d frames",
                      per_seq->card(), nframes);
        goto out;
    }
    to_utf8(ds);
    shared = seq_item(ds, DCM_SharedFunctionalGroupsSequence);
    echo_dim = echo_dimension(ds);

    f = static_cast<dcm_file *>(calloc(1, sizeof *f));
    if (!f) {
        st = dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory");
        goto out;
    }
    f->frames = static_cast<dcm_image *>(calloc(static_cast<size_t>(nframes), sizeof *f->frames));
    if (!f->frames) {
        st = dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory for %d frames", nframes);
        goto out;
    }
    f->nframes = nframes;
    init_image(&f->frames[0]);
    st = read_common(r, ds, meta, xfer_uid, &f->frames[0]);
    if (st != SW_OK)
        goto out;
    f->frames[0].frame_count = nframes;
    for (int i = nframes - 1; i >= 0; i--) {
        dcm_image *im = &f->frames[i];
        if (i > 0)
            *im = f->frames[0];
        im->frame = multiframe ? i + 1 : 0;
        Frame fr = {ds, per_seq ? per_seq->getItem(static_cast<unsigned long>(i)) : nullptr,
                    shared};
        read_frame(fr, echo_dim, im);
    }
    if (multiframe && echo_dim < 0 && per_seq)
        echo_by_rank(f);
    if (!r.header_only) {
        st = read_pixels(r, ds, xfer, f);
        if (st != SW_OK)
            goto out;
    }
    *out = f;
    f = nullptr;
out:
    dcm_file_free(f);
    return st;
}

/* Turns a DCMTK load failure into our message. has_dicm: the input has the "DICM" prefix at
 * offset 128, so it is DICOM that is damaged rather than some other kind of file. */
sw_status load_failed(const Reader &r, OFCondition c, bool has_dicm)
{
    /* DCMTK says so when an allocation failed: the machine's fault, not the file's (the service
     * tries such a file again instead of quarantining it). */
    if (c == EC_MemoryExhausted)
        return dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory while parsing (%s)", c.text());
    if (!has_dicm)
        return dcm_fail(r.err, SW_EFORMAT, r.name,
                        "not a DICOM file (no DICM prefix, and no readable dataset: %s)", c.text());
    if (c == EC_StreamNotifyClient || c == EC_PrematureSequDelimitationItem)
        return dcm_fail(r.err, SW_EFORMAT, r.name, "truncated DICOM data (%s)", c.text());
    return dcm_fail(r.err, SW_EFORMAT, r.name, "malformed DICOM data (%s)", c.text());
}

bool dicm_at_128(const unsigned char *b, size_t n)
{
    return n >= 132 && memcmp(b + 128, "DICM", 4) == 0;
}

/* Reads the first 132 bytes of a file to see whether it has the DICM prefix. */
bool file_has_dicm(const char *path)
{
    unsigned char b[132];
    FILE *fp = fopen(path, "rb");
    if (!fp)
        return false;
    size_t n = fread(b, 1, sizeof b, fp);
    fclose(fp);
    return dicm_at_128(b, n);
}

/* Is this a DICOM object at all? DCMTK parses almost any bytes as a meta-less dataset; insist on
 * a meta header or on the identifying attributes every stored object has. */
bool looks_dicom(DcmMetaInfo *meta, DcmDataset *ds)
{
    if (meta && meta->card() > 0)
        return true;
    return elem(ds, DCM_SOPClassUID) || elem(ds, DCM_Modality) || elem(ds, DCM_PixelData);
}

sw_status check_args(const Reader &r, dcm_file **out)
{
    if (!out)
        return dcm_fail(r.err, SW_EINVAL, r.name, "no output given");
    *out = nullptr;
    if (!dcm_is_initialised())
        return dcm_fail(r.err, SW_EINVAL, r.name, "dcm_init has not been called");
    return SW_OK;
}

/* How deep sequences nest, walked without recursion before DCMTK parses (its parser, searches and
 * destructors recurse once per level: 20000 nested empty sequences, 400 kB, overflowed an 8 MiB
 * stack). The walk follows the rules DCMTK reads by (PS3.5 7.1 to 7.5): explicit or implicit VR,
 * little or big endian, undefined lengths closed by delimiters, UN with undefined length and UN
 * whose dictionary VR is SQ read as implicit VR sequences (dcm_init enables that conversion),
 * implicit VR sequences of defined length told by the dictionary, encapsulated pixel data's
 * fragments skipped, sequences longer than the file read to its end. Where the walk cannot follow,
 * the item tags left bound what DCMTK could still nest. Returns the deepest level reached, -1
 * past DCM_MAX_DEPTH, NESTING_PAST_END when an element's value runs past the end, or
 * NESTING_DIRECTORY at a DirectoryRecordSequence, or NESTING_TOO_MANY past DCM_MAX_ELEMENTS
 * elements and items. */
constexpr int NESTING_PAST_END = -2; /* nesting_depth: an element's value runs past the end */
constexpr int NESTING_DIRECTORY = -3; /* nesting_depth: a DirectoryRecordSequence (a DICOMDIR) */
constexpr int NESTING_TOO_MANY = -4;  /* nesting_depth: more than DCM_MAX_ELEMENTS elements */

int nesting_depth(const unsigned char *p, size_t len, size_t pos, bool explicit_vr, bool big)
{
    struct Level {
        size_t end;     /* defined length: where the level ends; SIZE_MAX: undefined length */
        bool implicit;  /* content in implicit VR (a UN read as a sequence) */
        bool fragments; /* encapsulated pixel data: items hold bytes, not elements */
    };
    Level st[DCM_MAX_DEPTH + 1];
    int depth = 0, deepest = 0;
    auto u16 = [&](size_t at) -> unsigned {
        return big ? (p[at] << 8) | p[at + 1] : p[at] | (p[at + 1] << 8);
    };
    auto u32 = [&](size_t at) -> uint32_t {
        return big ? (static_cast<uint32_t>(p[at]) << 24) | (p[at + 1] << 16) | (p[at + 2] << 8) |
                         p[at + 3]
                   : p[at] | (p[at + 1] << 8) | (p[at + 2] << 16) |
                         (static_cast<uint32_t>(p[at + 3]) << 24);
    };
    auto push = [&](size_t end, bool implicit, bool fragments) -> bool {
        if (depth == DCM_MAX_DEPTH)
            return false;
        st[depth++] = {end, implicit, fragments};
        if (depth > deepest)
            deepest = depth;
        return true;
    };
    /* Where the walk cannot follow DCMTK (bytes that are no explicit VR, a value longer than the
     * file): every level DCMTK could still open needs an item tag, so their count in the rest
     * bounds the depth. */
    size_t count = 0;
    auto rest_bound = [&](size_t from, size_t to) -> int {
        size_t items = 0;
        for (size_t k = from; k + 4 <= to; k++)
            if ((p[k] == 0xFE && p[k + 1] == 0xFF && p[k + 2] == 0x00 && p[k + 3] == 0xE0) ||
                (p[k] == 0xFF && p[k + 1] == 0xFE && p[k + 2] == 0xE0 && p[k + 3] == 0x00))
                items++;
        return static_cast<size_t>(depth) + items > DCM_MAX_DEPTH ? -1 : deepest;
    };
    /* Bytes the walk cannot follow at all (damage): DCMTK may still read them as elements of 8
     * bytes or more each, so their number bounds the count. */
    auto rest_elements = [&](size_t from) -> int {
        if (count + (len - from) / 8 > DCM_MAX_ELEMENTS)
            return NESTING_TOO_MANY;
        return rest_bound(from, len);
    };
    while (pos + 8 <= len) {
        while (depth > 0 && st[depth - 1].end != SIZE_MAX && pos >= st[depth - 1].end)
            depth--;
        if (++count > DCM_MAX_ELEMENTS)
            return NESTING_TOO_MANY;
        unsigned group = u16(pos), el = u16(pos + 2);
        if (group == 0xFFFE) {
            uint32_t n = u32(pos + 4);
            pos += 8;
            if (el == 0xE000) { /* item */
                if (depth > 0 && st[depth - 1].fragments) {
                    if (n == 0xFFFFFFFFu || n > len - pos)
                        return rest_elements(pos);
                    pos += n; /* a fragment: bytes */
                } else if (!push(n == 0xFFFFFFFFu ? SIZE_MAX : pos + n,
                                 depth > 0 && st[depth - 1].implicit, false)) {
                    return -1;
                }
            } else if ((el == 0xE00D || el == 0xE0DD) && depth > 0 &&
                       st[depth - 1].end == SIZE_MAX) {
                depth--; /* item or sequence delimiter closes the open undefined level */
            }
            continue;
        }
        bool implicit = !explicit_vr || (depth > 0 && st[depth - 1].implicit);
        uint32_t n;
        bool sq = false, un = false;
        if (implicit) {
            n = u32(pos + 4);
            pos += 8;
            sq = DcmTag(static_cast<Uint16>(group), static_cast<Uint16>(el)).getEVR() == EVR_SQ;
        } else {
            char a = static_cast<char>(p[pos + 4]), b = static_cast<char>(p[pos + 5]);
            if (a < 'A' || a > 'Z' || b < 'A' || b > 'Z')
                return rest_elements(pos); /* not an explicit VR */
            /* VRs with a 4-byte length (PS3.5 7.1.2) */
            bool long_vr = (a == 'O' && strchr("BDFLVW", b)) || (a == 'S' && strchr("QV", b)) ||
                           (a == 'U' && strchr("CNRTV", b));
            if (long_vr) {
                if (pos + 12 > len)
                    return deepest;
                n = u32(pos + 8);
                pos += 12;
            } else {
                n = u16(pos + 6);
                pos += 8;
            }
            sq = a == 'S' && b == 'Q';
            un = a == 'U' && b == 'N';
            if (un && n != 0xFFFFFFFFu &&
                DcmTag(static_cast<Uint16>(group), static_cast<Uint16>(el)).getEVR() == EVR_SQ)
                sq = true; /* read as an implicit VR sequence */
        }
        /* DCMTK parses the items of a DirectoryRecordSequence as directory records, and a
         * damaged record type made it throw from inside its parser (found by libFuzzer), which
         * leaves the half-built tree unreachable. A media directory is no image: refused here. */
        if (group == 0x0004 && el == 0x1220)
            return NESTING_DIRECTORY;
        bool content_implicit = implicit || un;
        if (n == 0xFFFFFFFFu) {
            bool pixels = group == 0x7FE0 && el == 0x0010;
            if (!push(SIZE_MAX, content_implicit, pixels))
                return -1;
        } else if (sq) {
            /* a sequence longer than the file: DCMTK still reads what is there */
            if (!push(n > len - pos ? len : pos + n, content_implicit, false))
                return -1;
        } else {
            /* A value past the end of the data: a truncated file or a forged length, which DCMTK
             * may allocate in full before it finds the end (a 3 GB UT value in a 400 kB file,
             * found by libFuzzer). Sequences and undefined lengths are handled above. */
            if (n > len - pos)
                return NESTING_PAST_END;
            /* A private element the walk cannot type (DCMTK may know it as a sequence from its
             * private dictionary, by creator): the item tags inside bound its nesting. */
            if ((group & 1) && (implicit || un) && rest_bound(pos, pos + n) < 0)
                return -1;
            pos += n;
        }
    }
    return deepest;
}

/* The data set's start and encoding, from the meta header's TransferSyntaxUID (or, without a
 * meta header, the way DCMTK guesses: explicit when the bytes after the first tag are a VR). */
void dataset_start(const unsigned char *p, size_t len, size_t *pos, bool *explicit_vr, bool *big,
                   bool *deflated)
{
    *pos = 0;
    *explicit_vr = len >= 6 && p[4] >= 'A' && p[4] <= 'Z' && p[5] >= 'A' && p[5] <= 'Z';
    *big = false;
    *deflated = false;
    if (len < 132 || memcmp(p + 128, "DICM", 4) != 0)
        return;
    size_t at = 132;
    char uid[65] = "";
    while (at + 8 <= len && (p[at] | (p[at + 1] << 8)) == 0x0002) {
        unsigned el = p[at + 2] | (p[at + 3] << 8);
        char a = static_cast<char>(p[at + 4]), b = static_cast<char>(p[at + 5]);
        bool long_vr = (a == 'O' && (b == 'B' || b == 'W' || b == 'F')) || (a == 'S' && b == 'Q') ||
                       (a == 'U' && (b == 'T' || b == 'N'));
        size_t n, hdr = long_vr ? 12 : 8;
        if (at + hdr > len)
            return;
        n = long_vr ? (p[at + 8] | (p[at + 9] << 8) | (p[at + 10] << 16) |
                       (static_cast<size_t>(p[at + 11]) << 24))
                    : static_cast<size_t>(p[at + 6] | (p[at + 7] << 8));
        if (n > len - at - hdr)
            return;
        if (el == 0x0010 && n < sizeof uid) {
            size_t k = n;
            memcpy(uid, p + at + hdr, k);
            uid[k] = '\0';
            while (k > 0 && (uid[k - 1] == ' ' || uid[k - 1] == '\0'))
                uid[--k] = '\0';
        }
        at += hdr + n;
    }
    *pos = at;
    *explicit_vr = strcmp(uid, "1.2.840.10008.1.2") != 0;
    *big = strcmp(uid, "1.2.840.10008.1.2.2") == 0;
    *deflated = strcmp(uid, "1.2.840.10008.1.2.1.99") == 0;
}

/* Inflates a deflated data set (PS3.5 A.5: raw deflate; a zlib header, which some writers add, is
 * accepted as DCMTK accepts it). out == nullptr: only counts the inflated bytes into *total,
 * stopping past DCM_MAX_INFLATED_BYTES; else fills out (of *total bytes, the count) too. A stream zlib
 * cannot read ends the output early: DCMTK's parse then says what is wrong. Returns -1 when zlib
 * cannot start, 0 otherwise. */
int inflate_pass(const unsigned char *p, size_t len, unsigned char *out, size_t *total)
{
    z_stream zs;
    memset(&zs, 0, sizeof zs);
    bool zlib_hdr = len >= 2 && (p[0] & 0x0F) == 8 && ((p[0] << 8) | p[1]) % 31 == 0;
    if (inflateInit2(&zs, zlib_hdr ? 15 : -15) != Z_OK)
        return -1;
    static thread_local unsigned char scratch[1 << 16];
    const size_t cap = static_cast<size_t>(DCM_MAX_INFLATED_BYTES);
    size_t fed = 0, have = 0, room = out ? *total : 0;
    int z = Z_OK;
    while (z == Z_OK) {
        if (zs.avail_in == 0) {
            if (fed == len)
                break;
            size_t step = len - fed < (1u << 30) ? len - fed : (1u << 30);
            zs.next_in = const_cast<Bytef *>(p + fed);
            zs.avail_in = static_cast<uInt>(step);
            fed += step;
        }
        if (out) {
            if (have == room)
                break;
            size_t step = room - have < (1u << 30) ? room - have : (1u << 30);
            zs.next_out = out + have;
            zs.avail_out = static_cast<uInt>(step);
            z = inflate(&zs, Z_NO_FLUSH);
            have += step - zs.avail_out;
        } else {
            zs.next_out = scratch;
            zs.avail_out = sizeof scratch;
            z = inflate(&zs, Z_NO_FLUSH); /* Z_STREAM_END, or an error: the output ends here */
            have += sizeof scratch - zs.avail_out;
            if (have > cap)
                break;
        }
    }
    inflateEnd(&zs);
    *total = have;
    return 0;
}

/* The inflated data set into out, refused past DCM_MAX_INFLATED_BYTES before anything is
 * allocated: one pass counts, a second fills a buffer of that size. */
sw_status inflate_dataset(const Reader &r, const unsigned char *p, size_t len,
                          std::unique_ptr<unsigned char[]> &out, size_t *out_len)
{
    size_t total = 0;
    if (inflate_pass(p, len, nullptr, &total) != 0)
        return dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory for inflating");
    if (total > static_cast<size_t>(DCM_MAX_INFLATED_BYTES))
        return dcm_fail(r.err, SW_EUNSUPPORTED, r.name,
                        "the deflated data set inflates to more than %d MiB",
                        DCM_MAX_INFLATED_BYTES / 1048576);
    /* not value-initialised: the second pass writes every byte it reports */
    out.reset(new (std::nothrow) unsigned char[total ? total : 1]);
    if (!out)
        return dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory for inflating");
    if (total && inflate_pass(p, len, out.get(), &total) != 0)
        return dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory for inflating");
    *out_len = total;
    return SW_OK;
}

/* Checks what DCMTK would otherwise find out too late, before it parses: how deep sequences nest
 * (nesting_depth), and for a deflated data set how large it inflates (DCMTK inflates it whole
 * while it parses, so a small file can claim gigabytes: a 337 kB file made the reader hold 430 MB
 * for 6 s). The input is mapped, not copied. A deflated data set that passes is handed back
 * inflated (`inflated`, `inflated_len`), for load to parse instead of the deflated stream. */
sw_status check_structure(const Reader &r, const char *path,
                          std::unique_ptr<unsigned char[]> &inflated, size_t *inflated_len,
                          bool *deflated)
{
    sw_status st = SW_OK;
    struct stat sb;
    void *map = MAP_FAILED;
    size_t len = 0, pos;
    bool explicit_vr, big;
    int depth;
    int fd = open(path, O_RDONLY | O_CLOEXEC);
    *deflated = false;
    *inflated_len = 0;
    if (fd < 0 || fstat(fd, &sb) != 0 || sb.st_size <= 0)
        goto out; /* the loader reports it */
    len = static_cast<size_t>(sb.st_size);
    map = mmap(nullptr, len, PROT_READ, MAP_PRIVATE, fd, 0);
    if (map == MAP_FAILED)
        goto out;
    {
        const unsigned char *p = static_cast<const unsigned char *>(map);
        dataset_start(p, len, &pos, &explicit_vr, &big, deflated);
        if (*deflated) {
            st = inflate_dataset(r, p + pos, len - pos, inflated, inflated_len);
            if (st != SW_OK)
                goto out;
            depth = nesting_depth(inflated.get(), *inflated_len, 0, true, false);
        } else {
            depth = nesting_depth(p, len, pos, explicit_vr, big);
        }
    }
    /* Past the end means something only for a file that says it is DICOM (the loader tells
     * other bytes from DICOM by itself). */
    if (depth == NESTING_PAST_END && len >= 132 &&
        memcmp(static_cast<const unsigned char *>(map) + 128, "DICM", 4) == 0)
        st = dcm_fail(r.err, SW_EFORMAT, r.name,
                      "truncated DICOM data (an element's value length runs past the end of the "
                      "data)");
    else if (depth == NESTING_DIRECTORY)
        st = dcm_fail(r.err, SW_EUNSUPPORTED, r.name,
                      "a DICOM media directory (DICOMDIR: DirectoryRecordSequence), not an image");
    else if (depth == NESTING_TOO_MANY)
        st = dcm_fail(r.err, SW_EFORMAT, r.name, "more than %d data elements", DCM_MAX_ELEMENTS);
    else if (depth < 0 && depth != NESTING_PAST_END)
        st = dcm_fail(r.err, SW_EFORMAT, r.name, "sequences nested deeper than %d levels",
                      DCM_MAX_DEPTH);
out:
    if (map != MAP_FAILED)
        munmap(map, len);
    if (fd >= 0)
        close(fd);
    return st;
}

/* Writes bytes into a new anonymous memory file; its descriptor and, in proc, the path DCMTK
 * opens it by (/proc/self/fd/N), or -1 with the reason set. */
int memory_file(const Reader &r, const unsigned char *p, size_t len, char (&proc)[64],
                sw_status *st)
{
    int fd = memfd_create("swdicom", MFD_CLOEXEC);
    size_t done = 0;
    if (fd < 0) {
        *st = dcm_fail(r.err, SW_EIO, r.name, "memfd_create: %s", strerror(errno));
        return -1;
    }
    while (done < len) {
        ssize_t w = write(fd, p + done, len - done);
        if (w < 0 && errno == EINTR)
            continue;
        if (w <= 0) {
            *st = dcm_fail(r.err, SW_EIO, r.name, "cannot buffer the data: %s",
                           w < 0 ? strerror(errno) : "short write");
            close(fd);
            return -1;
        }
        done += static_cast<size_t>(w);
    }
    snprintf(proc, sizeof proc, "/proc/self/fd/%d", fd);
    *st = SW_OK;
    return fd;
}

/* The load once the structure has passed. A deflated data set is parsed from the bytes
 * check_structure inflated, as explicit VR little endian through a memory file (DCMTK's own
 * inflating stream spent 8 to 21 s on a 246 kB truncated deflated file, found by libFuzzer, and
 * its file stream checks each value length against what remains), the meta header from the file
 * itself. */
sw_status load_checked(const Reader &r, const char *path, bool has_dicm,
                       const unsigned char *inflated, size_t inflated_len, bool deflated,
                       dcm_file **out)
{
    DcmFileFormat ff, dff;
    DcmFileFormat &data = deflated ? dff : ff;
    OFCondition c;
    if (deflated) {
        sw_status st;
        char proc[64];
        c = ff.loadFile(path, EXS_Unknown, EGL_noChange, DCM_MaxReadLength, ERM_metaOnly);
        if (c.bad())
            return load_failed(r, c, has_dicm);
        int fd = memory_file(r, inflated, inflated_len, proc, &st);
        if (fd < 0)
            return st;
        c = dff.loadFile(proc, EXS_LittleEndianExplicit, EGL_noChange, DCM_MaxReadLength,
                         ERM_dataset);
        /* All of it, even for a header: a value left in the memory file could not be read
         * once it closes. */
        if (c.good())
            c = dff.loadAllDataIntoMemory();
        close(fd);
        if (c == EC_MemoryExhausted)
            return dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory while loading (%s)",
                            c.text());
        if (c.bad())
            return load_failed(r, c, has_dicm);
    } else {
        c = ff.loadFile(path, EXS_Unknown, EGL_noChange, DCM_MaxReadLength, ERM_autoDetect);
        if (c.bad())
            return load_failed(r, c, has_dicm);
    }
    if (!looks_dicom(ff.getMetaInfo(), data.getDataset()))
        return dcm_fail(r.err, SW_EFORMAT, r.name, "not a DICOM file");
    if (!r.header_only && !deflated) {
        /* Everything into memory now: the file may be moved once we return. */
        c = ff.loadAllDataIntoMemory();
        if (c == EC_MemoryExhausted)
            return dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory while loading (%s)",
                            c.text());
        if (c.bad())
            return dcm_fail(r.err, SW_EFORMAT, r.name, "truncated or unreadable data (%s)",
                            c.text());
    }
    return build(r, ff.getMetaInfo(), data.getDataset(), out);
}

/* Loads what DCMTK opens as `path` (a file, or a memfd through /proc) and builds the result;
 * messages name r.name. has_dicm: whether the input has the DICM prefix. */
sw_status load(const Reader &r, const char *path, bool has_dicm, dcm_file **out)
{
    std::unique_ptr<unsigned char[]> inflated;
    size_t inflated_len = 0;
    bool deflated = false;
    sw_status st = check_structure(r, path, inflated, &inflated_len, &deflated);
    if (st != SW_OK)
        return st;
    try {
        return load_checked(r, path, has_dicm, inflated.get(), inflated_len, deflated, out);
    } catch (const std::bad_alloc &) {
        return dcm_fail(r.err, SW_ENOMEM, r.name, "out of memory");
    } catch (...) {
        return dcm_fail(r.err, SW_EFORMAT, r.name, "unexpected failure while parsing");
    }
}

} /* namespace */

extern "C" sw_status dcm_read_file(const char *path, const dcm_read_opts *opts, dcm_file **out,
                                   sw_error *err)
{
    Reader r = {path ? path : "(null)", err, opts ? opts->header_only : 0};
    sw_status st = check_args(r, out);
    if (st != SW_OK)
        return st;
    if (!path)
        return dcm_fail(err, SW_EINVAL, r.name, "no path given");
    struct stat sb;
    if (stat(path, &sb) != 0)
        return dcm_fail(err, SW_EIO, path, "%s", strerror(errno));
    if (!S_ISREG(sb.st_mode))
        return dcm_fail(err, SW_EIO, path, "not a regular file");
    if (sb.st_size == 0)
        return dcm_fail(err, SW_EFORMAT, path, "empty file");
    return load(r, path, file_has_dicm(path), out);
}

/* The buffer goes into an anonymous memory file and is read like a file: DCMTK's file stream
 * checks every value length against the bytes that remain. Its buffer stream did not (measured
 * under AddressSanitizer: with a damaged length field of 2.9 GB one read spent 0.7 s clearing
 * freshly allocated memory; through the memory file, none). */
extern "C" sw_status dcm_read_buffer(const void *data, size_t len, const char *name,
                                     const dcm_read_opts *opts, dcm_file **out, sw_error *err)
{
    Reader r = {name ? name : "(buffer)", err, opts ? opts->header_only : 0};
    sw_status st = check_args(r, out);
    int fd = -1;
    const unsigned char *p = static_cast<const unsigned char *>(data);
    char proc[64];
    if (st != SW_OK)
        return st;
    if (!data && len)
        return dcm_fail(err, SW_EINVAL, r.name, "no data given");
    if (len == 0)
        return dcm_fail(err, SW_EFORMAT, r.name, "empty buffer");
    fd = memory_file(r, p, len, proc, &st);
    if (fd < 0)
        goto out;
    st = load(r, proc, dicm_at_128(p, len), out);
out:
    if (fd >= 0)
        close(fd);
    return st;
}

extern "C" void dcm_file_free(dcm_file *f)
{
    if (!f)
        return;
    if (f->frames)
        for (int i = 0; i < f->nframes; i++)
            free(f->frames[i].pixels);
    free(f->frames);
    free(f);
}
